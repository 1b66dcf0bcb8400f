# The movie and its figures.


rule assemble:
    input:
        binned=f"{OUT}/binned.zarr",
        selection=f"{OUT}/selection.zarr",
        shots=f"{OUT}/shots.zarr",
    output:
        directory(f"{OUT}/movie.zarr"),
    params:
        {k: v for k, v in config.items() if k != "compute"},
    run:
        from movieproc.stages import assemble

        assemble.run(input.binned, input.selection, input.shots, output[0], config)


rule render:
    input:
        f"{OUT}/movie.zarr",
    output:
        f"{OUT}/figures/difference_map.png",
        f"{OUT}/figures/difference_curves.png",
    params:
        section("render", "run"),
    run:
        from movieproc.stages import render

        render.run(input[0], f"{OUT}/figures", config)
