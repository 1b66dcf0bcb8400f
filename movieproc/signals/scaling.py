"""Absolute scale: difference signals in electron units per solute molecule.

After normalization a difference is a fraction of the mean intensity in the
normalization window. Far from the liquid's structure peaks that intensity is
the independent-atom scattering (sum of f0^2 plus incoherent) of one solute
molecule and its share of solvent molecules (the "liquid unit cell"); the
solute's own coherent part is its Debye sum. Multiplying by the window mean of
that sum puts the data in e.u. per solute, where the excitation fraction is no
longer degenerate with the overall scale.
"""

from __future__ import annotations

import re

import numpy as np

from ..errors import ConfigError
from .normalize import window_mask


def parse_formula(formula: str) -> dict:
    """Element counts of a simple chemical formula, e.g. ``"C2H4O"`` -> {C: 2, H: 4, O: 1}."""
    text = str(formula).strip()
    parts = re.findall(r"([A-Z][a-z]?)(\d*)", text)
    if not parts or "".join(s + n for s, n in parts) != text:
        raise ConfigError("scaling.solvent_formula", repr(formula), "a formula of element symbols and counts, e.g. H2O")
    counts: dict = {}
    for sym, num in parts:
        counts[sym] = counts.get(sym, 0) + (int(num) if num else 1)
    return counts


def independent_atom_scattering(q, formula: str):
    """Coherent sum of f0^2 and incoherent scattering of one molecule's free atoms.

    Parameters
    ----------
    q : array_like (nq,)
        1/Å.
    formula : str
        Chemical formula.

    Returns
    -------
    coherent, incoherent : ndarray (nq,), e.u.
    """
    from ..scattering.formfactors import form_factor, incoherent

    q = np.asarray(q, float)
    coh = np.zeros(q.shape)
    inc = np.zeros(q.shape)
    for sym, n in parse_formula(formula).items():
        coh += n * form_factor(q, sym) ** 2
        inc += n * incoherent(q, sym)
    return coh, inc


def unit_cell_scattering(q, solute_S, solute_elements, solvent_formula, solvent_per_solute):
    """Scattering of one solute molecule and its share of solvent, independent-atom solvent, e.u.

    Parameters
    ----------
    q : array_like (nq,)
        1/Å.
    solute_S : array_like (nq,)
        Debye scattering of the ground-state solute, e.u.
    solute_elements : sequence of str
        Solute atoms (their incoherent scattering is added).
    solvent_formula : str
        Formula of one solvent molecule.
    solvent_per_solute : float
        Solvent molecules per solute molecule.
    """
    from ..scattering.formfactors import incoherent

    q = np.asarray(q, float)
    coh, inc = independent_atom_scattering(q, solvent_formula)
    solute_inc = sum(incoherent(q, e) for e in solute_elements)
    return np.asarray(solute_S, float) + solute_inc + solvent_per_solute * (coh + inc)


def absolute_scale(q, unit_cell, q_range, reference=None):
    """Factor from the data's units to e.u. per solute molecule.

    Parameters
    ----------
    q : array_like (nq,)
        1/Å.
    unit_cell : array_like (nq,)
        Scattering of one solute and its share of solvent (:func:`unit_cell_scattering`), e.u.
    q_range : (float, float)
        A high-q window (1/Å) where the liquid's structure has faded, so the
        measured intensity follows the independent-atom ``unit_cell``.
    reference : array_like (nq,), optional
        The measured pump-off curve in the data's units (e.g. the mean of the
        normalized pump-off curves). The factor is window mean of ``unit_cell``
        over window mean of ``reference``: right whatever the curves were
        normalized by (window, total or nothing). Without it the data are
        taken as normalized to 1 in the window.

    Returns
    -------
    float
    """
    m = window_mask(q, q_range)
    factor = float(np.mean(np.asarray(unit_cell)[m]))
    if reference is not None:
        ref = float(np.mean(np.asarray(reference)[m]))
        if not ref > 0:
            raise ConfigError("differences.norm_q_range", f"a pump-off mean of {ref!r} in the window",
                              "a window of positive measured intensity for the absolute scale")
        factor /= ref
    return factor
