# The movie and its figures.


rule assemble:
    input:
        binned=zstore("binned"),
        selection=zstore("selection"),
        shots=zstore("shots"),
        analysis=zstore("analysis"),
    output:
        zstore("movie"),
    params:
        {k: v for k, v in config.items() if k != "compute"},
    run:
        from movieproc.stages import assemble

        run_stage(assemble.run, folder(input.binned), folder(input.selection), folder(input.shots), folder(output[0]), config, extra=[folder(input.analysis)])


rule render:
    input:
        zstore("movie"),
    output:
        f"{OUT}/figures/.done",
    params:
        section("render", "run"),
    run:
        from movieproc.stages import render

        run_stage(render.run, folder(input[0]), f"{OUT}/figures", config)
        Path(f"{OUT}/figures/.done").write_text("figures written\n")
