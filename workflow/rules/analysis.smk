# Structure scattering, solvent terms, SVD and fits.


def _model_inputs(wildcards=None):
    m = config["model"]
    files = [m["ground"]] + list(m["trajectory"]) + list(m["species"].values())
    return [f for f in files if f]


if config["model"]["ground"]:

    rule scatter:
        input:
            shots=zstore("shots"),
            structures=_model_inputs(),
        output:
            zstore("models"),
        params:
            section("model"),
        threads: workflow.cores
        run:
            from movieproc.io import store
            from movieproc.stages import scatter

            m = config["model"]
            q = store.read(store.open_group(folder(input.shots), "shots store"), "q")
            options = {"dr": m["dr"], "energy": m["photon_energy_kev"], "anomalous": m["anomalous"],
                       "excluded_volume": m["excluded_volume"], "damping": m["damping_A"],
                       "num_workers": config["compute"]["workers"]}
            run_stage(scatter.run, m["ground"], m["trajectory"], m["species"], q, folder(output[0]), options)


rule analyze:
    input:
        binned=zstore("binned"),
        models=[zstore("models")] if config["model"]["ground"] else [],
        files=[config["solvent"]["differentials"]] if config["solvent"]["differentials"] else [],
    output:
        zstore("analysis"),
    params:
        section("scaling", "solvent", "svd", "fit", "model", "differences"),
    threads: workflow.cores
    run:
        from movieproc.stages import analyze

        run_stage(analyze.run, folder(input.binned), folder(input.models[0]) if input.models else None, folder(output[0]), config)
