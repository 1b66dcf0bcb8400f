# Shot selection, delay correction, binning and differences.


rule select:
    input:
        shots=f"{OUT}/shots.zarr",
    output:
        directory(f"{OUT}/selection.zarr"),
    params:
        section("selection", "differences"),
    threads: workflow.cores
    run:
        from movieproc.stages import select

        select.run(input.shots, output[0], config)


rule time:
    input:
        shots=f"{OUT}/shots.zarr",
    output:
        directory(f"{OUT}/delays.zarr"),
    params:
        section("timing"),
    run:
        from movieproc.stages import delays

        delays.run(input.shots, output[0], config)


rule bin:
    input:
        shots=f"{OUT}/shots.zarr",
        selection=f"{OUT}/selection.zarr",
        delays=f"{OUT}/delays.zarr",
    output:
        directory(f"{OUT}/bins.zarr"),
    params:
        section("binning"),
    run:
        from movieproc.stages import bins

        bins.run(input.shots, input.selection, input.delays, output[0], config)


rule difference:
    input:
        shots=f"{OUT}/shots.zarr",
        selection=f"{OUT}/selection.zarr",
        bins=f"{OUT}/bins.zarr",
    output:
        directory(f"{OUT}/binned.zarr"),
    params:
        section("differences", "binning"),
    threads: workflow.cores
    run:
        from movieproc.stages import difference

        difference.run(input.shots, input.selection, input.bins, output[0], config)
