# Inputs: synthesize the demo run when asked, then read the run into the shots store.

if config["run"].get("generate"):

    rule synthesize:
        input:
            scenario=config["run"]["generate"]["scenario"],
        output:
            files=config["run"]["files"],
            truth=config["run"]["generate"]["truth"] + "/zarr.json",
        params:
            generate=config["run"]["generate"],
        run:
            from movieproc import synth

            g = params.generate
            run_step(synth.synthesize_run, input.scenario, g["shots"], g["seed"], output.files, folder(output.truth), g["mode"])


rule ingest:
    input:
        files=config["run"]["files"],
    output:
        zstore("shots"),
    params:
        config=section("detector"),
    threads: workflow.cores
    run:
        stage("ingest", input, output, params.config)
