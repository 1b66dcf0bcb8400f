"""Read back what a movie (or an analysis store) keeps as variables and YAML text.

The movie's attributes are netCDF-safe strings and numbers (``movieproc.stages.assemble``):
the config is YAML text, warnings one per line, the fitted parameters variables over
``fit_parameter``, the selection counts a variable over ``selection_reason``. These
functions give them back as plain Python structures; each takes an open zarr group.
"""

from __future__ import annotations

import numpy as np

from . import store


def config(group) -> dict:
    """The config sections the movie was made from (attr ``config_yaml``)."""
    return dict(store.yaml_value(group.attrs, "config_yaml", {}) or {})


def warnings(group) -> list[str]:
    """Every warning the stages raised (attr ``warnings``, one per line)."""
    return store.text_list(group.attrs, "warnings")


def _strings(group, name) -> list[str]:
    return [str(v) for v in group[name][...]] if name in group else []


def input_files(group) -> dict[str, str]:
    """Run file -> checksum (variables ``input_file``, ``input_checksum``)."""
    files = _strings(group, "input_file")
    sums = _strings(group, "input_checksum") or [""] * len(files)
    return dict(zip(files, sums, strict=True))


def selection_counts(group) -> dict[str, int]:
    """Shots per selection reason and the selection's totals (variable ``selection_count``)."""
    reasons = _strings(group, "selection_reason")
    counts = group["selection_count"][...] if "selection_count" in group else []
    return {r: int(c) for r, c in zip(reasons, counts, strict=True)}


def fit_parameters(group) -> dict[str, dict]:
    """Fitted parameters: name -> {value, error, error_independent_bins, units[, bootstrap_error, bootstrap]}.

    Empty when the store holds no fit. Errors are standard errors; ``units`` is the
    pint string of the parameter (``ps`` or ``1``).
    """
    names = _strings(group, "fit_parameter")
    if not names:
        return {}
    units = _strings(group, "fit_parameter_units")
    boot = _strings(group, "fit_bootstrap")
    columns = {key: np.asarray(group[f"fit_{key}"][...], float)
               for key in ("value", "error", "error_independent_bins", "bootstrap_error") if f"fit_{key}" in group}
    out = {}
    for i, name in enumerate(names):
        entry: dict = {key: float(values[i]) for key, values in columns.items()}
        if not np.isfinite(entry.get("bootstrap_error", np.nan)):
            entry.pop("bootstrap_error", None)
        entry["units"] = units[i] if units else ""
        if boot and boot[i]:
            entry["bootstrap"] = boot[i]
        out[name] = entry
    return out


def fit_converged(group) -> bool:
    """Whether the global fit converged (attr ``fit_converged``; True when there is no fit)."""
    return bool(group.attrs.get("fit_converged", 1))


def fit_summary(group) -> dict:
    """What a figure of the fit needs: ``fit_mode``, ``fit_parameters``, ``fit_species`` and ``config``."""
    return {"fit_mode": group.attrs.get("fit_mode"), "fit_parameters": fit_parameters(group),
            "fit_species": _strings(group, "species"), "config": config(group)}


def display_units(array) -> str:
    """A short label of an array's units for figures (``display_units``, else ``units``)."""
    return str(array.attrs.get("display_units") or array.attrs.get("units", ""))


def term_units_label(group) -> str:
    """The units of the solvent coefficients per term, e.g. ``"K (dT), 1 (normalization)"``."""
    return ", ".join(f"{u} ({t})" for t, u in zip(_strings(group, "term"), _strings(group, "term_units"),
                                                   strict=True))


def readable_attrs(group) -> dict:
    """The movie's attrs with its YAML text, line lists and tabular variables as Python structures.

    Keys besides the stored scalars: ``config``, ``versions``, ``warnings`` (list),
    ``input_files`` (list), ``input_checksums``, ``selection_counts``, ``fit_parameters``,
    ``fit_species``, ``svd_structured`` (list of bool), the shapes older movies stored.
    """
    out = dict(group.attrs)
    files = input_files(group)
    derived = {"config": config(group), "versions": dict(store.yaml_value(group.attrs, "software_versions", {}) or {}),
               "warnings": warnings(group), "input_files": list(files), "input_checksums": files,
               "selection_counts": selection_counts(group), "fit_parameters": fit_parameters(group),
               "fit_species": _strings(group, "species")}
    if "svd_structured" in group:
        derived["svd_structured"] = [bool(b) for b in group["svd_structured"][...]]
    # an older movie keeps these as nested attrs: those stay where the new form is absent
    out.update({k: v for k, v in derived.items() if v or k not in out})
    return out
