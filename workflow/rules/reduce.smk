# Shot selection, delay correction, binning and differences.


rule select:
    input:
        shots=zstore("shots"),
    output:
        zstore("selection"),
    params:
        section("selection", "differences"),
    threads: workflow.cores
    run:
        from movieproc.stages import select

        run_stage(select.run, folder(input.shots), folder(output[0]), config)


rule time:
    input:
        shots=zstore("shots"),
    output:
        zstore("delays"),
    params:
        section("timing"),
    run:
        from movieproc.stages import delays

        run_stage(delays.run, folder(input.shots), folder(output[0]), config)


rule bin:
    input:
        shots=zstore("shots"),
        selection=zstore("selection"),
        delays=zstore("delays"),
    output:
        zstore("bins"),
    params:
        section("binning"),
    run:
        from movieproc.stages import bins

        run_stage(bins.run, folder(input.shots), folder(input.selection), folder(input.delays), folder(output[0]), config)


rule difference:
    input:
        shots=zstore("shots"),
        selection=zstore("selection"),
        bins=zstore("bins"),
    output:
        zstore("binned"),
    params:
        section("differences", "binning"),
    threads: workflow.cores
    run:
        from movieproc.stages import difference

        run_stage(difference.run, folder(input.shots), folder(input.selection), folder(input.bins), folder(output[0]), config)
