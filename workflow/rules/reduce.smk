# Shot selection, delay correction, binning and differences.


rule select:
    input:
        shots=zstore("shots"),
    output:
        zstore("selection"),
    params:
        # the outlier scores compare normalized curves: only the normalization of the differences
        config=section("selection", "differences.normalization", "differences.norm_q_range"),
    threads: workflow.cores
    run:
        stage("select", input, output, params.config)


rule time:
    input:
        shots=zstore("shots"),
    output:
        zstore("delays"),
    params:
        config=section("timing"),
    run:
        stage("delays", input, output, params.config)


rule bin:
    input:
        shots=zstore("shots"),
        selection=zstore("selection"),
        delays=zstore("delays"),
    output:
        zstore("bins"),
    params:
        config=section("binning"),
    run:
        stage("bins", input, output, params.config)


rule difference:
    input:
        shots=zstore("shots"),
        selection=zstore("selection"),
        bins=zstore("bins"),
    output:
        zstore("binned"),
    params:
        config=section("differences", "binning.min_shots"),
    threads: workflow.cores
    run:
        stage("difference", input, output, params.config)
