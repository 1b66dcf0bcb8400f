# Structure scattering, solvent terms, SVD and fits.


def _structure_files():
    """Every structure file of the model section (tracked as inputs of `scatter`)."""
    m = config["model"]
    files = [m["ground"]] + list(m["trajectory"]) + list(m["species"].values())
    return [f for f in files if f]


if config["model"]["ground"]:

    rule scatter:
        input:
            shots=zstore("shots"),
            structures=_structure_files(),
        output:
            zstore("models"),
        params:
            config=section("model"),
        threads: workflow.cores
        run:
            stage("scatter", input, output, params.config)


rule analyze:
    input:
        binned=zstore("binned"),
        models=[zstore("models")] if config["model"]["ground"] else [],
        differentials=[config["solvent"]["differentials"]] if config["solvent"]["differentials"] else [],
    output:
        zstore("analysis"),
    params:
        config=section("scaling", "solvent", "svd", "realspace", "fit", "differences"),
    threads: workflow.cores
    run:
        stage("analyze", input, output, params.config)
