# Inputs: synthesize the demo run when asked, then read the run into the shots store.

if config["run"].get("generate"):

    rule synthesize:
        input:
            scenario=config["run"]["generate"]["scenario"],
        output:
            files=config["run"]["files"],
            truth=directory(config["run"]["generate"]["truth"]),
        params:
            generate=config["run"]["generate"],
        run:
            from movieproc import synth

            g = params.generate
            synth.synthesize_run(input.scenario, g["shots"], g["seed"], output.files, output.truth, g["mode"])


rule ingest:
    input:
        config["run"]["files"],
    output:
        directory(f"{OUT}/shots.zarr"),
    params:
        section("detector"),
    threads: workflow.cores
    run:
        from movieproc.stages import ingest

        ingest.run(list(input), output[0], config)
