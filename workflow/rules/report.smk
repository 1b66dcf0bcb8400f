# The movie and its figures.

# Every section that shapes the movie (it records them in its attrs); `render` only
# changes the figures and `compute` how stages run, so neither re-runs `assemble`. The
# provenance (the overrides given) changes with every override, a render option too: the
# movie records the provenance of the run that made it, without it being a reason to remake it.
MOVIE_SECTIONS = [k for k in config if k not in ("render", "compute", "output_dir", "provenance")]


rule assemble:
    input:
        binned=zstore("binned"),
        selection=zstore("selection"),
        shots=zstore("shots"),
        analysis=zstore("analysis"),
    output:
        zstore("movie"),
    params:
        config=section(*MOVIE_SECTIONS),
    run:
        stage("assemble", input, output, dict(params.config, provenance=config.get("provenance")))


# The render rule also reads the per-shot timing (delays, shots) for the report's timing
# diagnostics; its params stay the render section and the run name.
rule render:
    input:
        movie=zstore("movie"),
        delays=zstore("delays"),
        shots=zstore("shots"),
    output:
        f"{OUT}/figures/.done",
    params:
        config=section("render", "run"),
    run:
        stage("render", input, output, params.config)
