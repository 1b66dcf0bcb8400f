"""Powder calibrants: the d-spacings of their reflections from published lattice constants.

Sources of the constants (Å):

- LaB6, simple cubic (Pm-3m, no systematic absences): a = 4.156826 Å, the
  certified value of NIST SRM 660c at 22.5 °C (certificate: 0.4156826 nm
  ± 0.000008 nm, k = 2).
- CeO2, fluorite (Fm-3m; reflections only with h, k, l all even or all odd):
  a = 5.411651 Å, NIST SRM 674b certificate (from memory: not checked against
  the certificate text).
- Silver behenate, lamellar: long spacing d(001) = 58.380(3) Å, measured by
  Huang, Toraya, Blanton & Wu, J. Appl. Cryst. 26 (1993) 180-184 against NIST
  silicon, and used as the reference value in the ICDD round robin of Blanton
  et al., Powder Diffraction 10 (1995) 91-95; reflections are the orders
  d(00l) = d(001) / l.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: NIST SRM 660c (LaB6) certified lattice parameter, Å.
LAB6_A = 4.156826
#: NIST SRM 674b (CeO2) lattice parameter, Å (from memory).
CEO2_A = 5.411651
#: Silver behenate long spacing d(001), Å (Huang et al., J. Appl. Cryst. 26 (1993) 180).
AGBE_D001 = 58.380
#: Largest h^2 + k^2 + l^2 (cubic) or order l (lamellar) listed: far past any detector's reach.
MAX_INDEX_SUM = 200
MAX_ORDER = 60

SOURCES = {
    "LaB6": "NIST SRM 660c certificate, a = 4.156826 Å (22.5 °C)",
    "CeO2": "NIST SRM 674b certificate, a = 5.411651 Å (value from memory)",
    "AgBe": "Huang et al., J. Appl. Cryst. 26 (1993) 180; Blanton et al., Powder Diffr. 10 (1995) 91: "
            "d(001) = 58.380 Å",
}
ALIASES = {"lab6": "LaB6", "ceo2": "CeO2", "agbe": "AgBe", "silver_behenate": "AgBe",
           "silver-behenate": "AgBe", "behenate": "AgBe"}


@dataclass(frozen=True)
class Calibrant:
    """A powder calibrant: its distinct d-spacings, largest first.

    Attributes
    ----------
    name : str
    d_spacings : ndarray (n,) float64
        Distinct d-spacings, Å, decreasing.
    labels : tuple of str
        Reflection(s) of each d-spacing, e.g. "(2 2 1)/(3 0 0)".
    source : str
        Where the lattice constant comes from.
    """

    name: str
    d_spacings: np.ndarray
    labels: tuple
    source: str

    def two_theta(self, photon_energy: float) -> np.ndarray:
        """Bragg angles 2theta = 2 asin(lambda / 2d), radians, increasing, (m,).

        Only the first m reflections (those with lambda / 2d < 1) are listed;
        ``photon_energy`` in keV.
        """
        from ..xray import wavelength

        ratio = wavelength(float(photon_energy)) / (2.0 * self.d_spacings)
        return 2.0 * np.arcsin(ratio[ratio < 1.0])


def cubic_reflections(a: float, rule: str = "all", max_index_sum: int = MAX_INDEX_SUM):
    """Distinct d-spacings of a cubic lattice, d = a / sqrt(h^2 + k^2 + l^2).

    Parameters
    ----------
    a : float
        Lattice constant, Å.
    rule : {"all", "fcc"}
        "all": every hkl (primitive cubic); "fcc": h, k, l all even or all odd.
    max_index_sum : int
        Largest h^2 + k^2 + l^2 listed.

    Returns
    -------
    d : ndarray (n,) float64
        Å, decreasing.
    labels : tuple of str
        The hkl (h >= k >= l >= 0) sharing each d.
    """
    if not a > 0:
        raise ValueError(f"a must be positive, got {a}")
    if rule not in ("all", "fcc"):
        raise ValueError(f"rule must be 'all' or 'fcc', got {rule!r}")
    top = int(np.sqrt(max_index_sum)) + 1
    groups: dict[int, list[str]] = {}
    for h in range(top + 1):
        for k in range(h + 1):
            for m in range(k + 1):
                s = h * h + k * k + m * m
                if s == 0 or s > max_index_sum:
                    continue
                parity = {h % 2, k % 2, m % 2}
                if rule == "fcc" and len(parity) != 1:
                    continue
                groups.setdefault(s, []).append(f"({h} {k} {m})")
    sums = np.array(sorted(groups), dtype=float)
    return a / np.sqrt(sums), tuple("/".join(groups[int(s)]) for s in sums)


def lamellar_reflections(d001: float, orders: int = MAX_ORDER):
    """Orders of a lamellar stack, d(00l) = d001 / l for l = 1..orders; (d Å decreasing, labels)."""
    if not d001 > 0:
        raise ValueError(f"d001 must be positive, got {d001}")
    orders_ = np.arange(1, int(orders) + 1)
    return d001 / orders_, tuple(f"(0 0 {n})" for n in orders_)


def from_spacings(d_spacings, name: str = "user") -> Calibrant:
    """A calibrant from a user's list of d-spacings, Å (any order; duplicates merged)."""
    d = np.unique(np.asarray(d_spacings, dtype=float))[::-1]
    if d.size == 0 or not np.all(np.isfinite(d)) or np.any(d <= 0):
        raise ValueError(f"d_spacings must be positive finite values in Å, got {list(d_spacings)}")
    return Calibrant(name, d, tuple(f"d={v:.5g}" for v in d), "d-spacings given by the user")


def get(name: str) -> Calibrant:
    """A calibrant by name: LaB6, CeO2, AgBe (silver behenate).

    Raises
    ------
    ValueError
        For an unknown name, listing the known ones.
    """
    key = ALIASES.get(str(name).strip().lower())
    if key == "LaB6":
        d, labels = cubic_reflections(LAB6_A, "all")
    elif key == "CeO2":
        d, labels = cubic_reflections(CEO2_A, "fcc")
    elif key == "AgBe":
        d, labels = lamellar_reflections(AGBE_D001)
    else:
        raise ValueError(f"calibrant must be one of LaB6, CeO2, AgBe (silver behenate), got {name!r}")
    return Calibrant(key, d, labels, SOURCES[key])
