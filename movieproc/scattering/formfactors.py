"""Atomic X-ray form factors: f0(q), anomalous terms f' + i f'', incoherent scattering.

Conventions: q in 1/Å, s = sin(theta)/lambda = q / (4 pi), photon energy in keV,
form factors in electron units (e.u.).

Sources
-------
- f0: the Waasmaier-Kirfel analytic approximation (Acta Cryst. A51, 416 (1995)),
  f0(s) = c + sum_{i=1..5} a_i exp(-b_i s^2), valid for 0 <= s <= 6 1/Å, for neutral
  atoms H-Cf and 112 ions. The coefficients are read from ``periodictable.cromermann``.
- f', f'': Henke, Gullikson & Davis tables (At. Data Nucl. Data Tables 54, 181 (1993))
  as shipped in ``periodictable`` (``elements[Z].xray.scattering_factors``), linearly
  interpolated in energy, 0.01-30 keV, Z <= 92; f' = f1 - Z, f'' = f2 (>= 0). They
  carry no edge fine structure: within a few tens of eV of an absorption edge, values
  from other tables can differ by several e.u. Ions take the neutral atom's f', f''.
- incoherent: the Waller-Hartree formula (Waller & Hartree, Proc. R. Soc. A 124, 119
  (1929)), S(q) = N - sum_{j,k same spin} |<j| exp(i q.r) |k>|^2, evaluated with
  screened hydrogen-like orbitals whose exponents follow Slater's rules (Slater, Phys.
  Rev. 36, 57 (1930)), orthogonalised within each angular momentum, spherically
  averaged, open shells averaged over their orbitals. It is exact for H and He; against
  Hubbell's tables it is within ~10 % of S for s >= 0.5 1/Å and within ~3 % of the total
  f0^2 + S over 0 < s <= 1.5 1/Å for Z <= 92 (the use it is meant for: absolute scaling).
"""

from __future__ import annotations

import re
from functools import lru_cache
from math import factorial

import numpy as np
import periodictable
from periodictable import cromermann
from scipy import constants
from scipy.special import spherical_jn

from ..errors import InputError, ParameterError

__all__ = [
    "S_MAX",
    "parse_element",
    "atomic_number",
    "electron_count",
    "form_factor",
    "form_factor_table",
    "anomalous_terms",
    "incoherent",
    "WATER_ELECTRON_DENSITY",
    "displaced_volume",
    "dummy_form_factor",
]

#: Upper end of the Waasmaier-Kirfel fit, s = sin(theta)/lambda in 1/Å.
S_MAX = 6.0

_SYMBOL = re.compile(r"^([A-Za-z]{1,2}?)(?:(\d*)([+-])|([+-])(\d*))?$")


def parse_element(element):
    """Split an element or ion symbol into element symbol and charge.

    Parameters
    ----------
    element : str
        "Ir", "Cl", "O", or an ion: "Fe2+", "Fe+2", "O2-", "Cl-", "Cl1-".

    Returns
    -------
    symbol : str
        Element symbol with standard capitalisation ("Fe").
    charge : int
        Ion charge in units of e (0 for a neutral atom).

    Raises
    ------
    InputError
        If ``element`` is not a known element symbol with an optional charge.
    """
    text = str(element).strip()
    m = _SYMBOL.match(text)
    if m is None:
        raise InputError(f"element '{element}'", "an unreadable symbol",
                         "an element symbol with optional charge, e.g. 'Ir', 'Fe2+', 'O2-'")
    sym = m.group(1).capitalize()
    if m.group(3):
        digits, sign = m.group(2), m.group(3)
    elif m.group(4):
        digits, sign = m.group(5), m.group(4)
    else:
        digits, sign = "", ""
    charge = (int(digits) if digits else 1) if sign else 0
    if sign == "-":
        charge = -charge
    try:
        el = periodictable.elements.symbol(sym)
    except ValueError:
        el = None
    if el is None or el.number < 1:
        raise InputError(f"element '{element}'", f"unknown element symbol '{sym}'",
                         "a chemical element symbol such as 'H', 'C', 'O', 'Cl', 'Fe', 'Ir'")
    return el.symbol, charge


def atomic_number(element):
    """Atomic number Z of an element or ion symbol (int)."""
    sym, _ = parse_element(element)
    return periodictable.elements.symbol(sym).number


def electron_count(element):
    """Number of electrons of an atom or ion: Z - charge (int)."""
    sym, charge = parse_element(element)
    return periodictable.elements.symbol(sym).number - charge


@lru_cache(maxsize=None)
def _wk_coefficients(element):
    """Return (a (5,), b (5,), c) of the Waasmaier-Kirfel fit for ``element``."""
    sym, charge = parse_element(element)
    key = sym if charge == 0 else f"{sym}{abs(charge)}{'+' if charge > 0 else '-'}"
    try:
        cmf = cromermann.getCMformula(key)
    except KeyError:
        raise InputError(f"element '{element}'", f"no Waasmaier-Kirfel coefficients for '{key}'",
                         "a neutral atom H-Cf or one of the tabulated ions (e.g. 'Fe2+', 'Fe3+', "
                         "'O2-', 'Cl1-')") from None
    return (np.array(cmf.a, dtype=np.float64), np.array(cmf.b, dtype=np.float64), float(cmf.c))


def _check_q(q, what):
    q = np.asarray(q, dtype=np.float64)
    if q.ndim != 1:
        raise InputError(what, f"q with shape {q.shape}", "a 1-D array of q values (1/Å)")
    if q.size and not np.all(np.isfinite(q)):
        raise InputError(what, "non-finite q values", "finite q values (1/Å)")
    if q.size and q.min() < 0:
        raise InputError(what, f"negative q ({q.min():g} 1/Å)", "q >= 0 (1/Å)")
    return q


def _f0(q, element):
    a, b, c = _wk_coefficients(element)
    s2 = (q / (4.0 * np.pi)) ** 2
    if q.size and q.max() > 4.0 * np.pi * S_MAX:
        raise InputError(f"form factor of '{element}'", f"q up to {q.max():g} 1/Å",
                         f"q <= {4 * np.pi * S_MAX:.1f} 1/Å (s <= {S_MAX:g} 1/Å, range of the "
                         "Waasmaier-Kirfel fit)")
    return c + np.exp(-np.multiply.outer(s2, b)) @ a


def anomalous_terms(element, photon_energy):
    """Anomalous scattering terms f' and f'' at a photon energy.

    Parameters
    ----------
    element : str
        Element or ion symbol; ions take the neutral atom's values.
    photon_energy : float
        Photon energy, keV (0.01-30 keV, the range of the Henke tables).

    Returns
    -------
    f1 : float
        f' = f1 - Z, e.u. (negative below an absorption edge).
    f2 : float
        f'' >= 0, e.u.

    Raises
    ------
    InputError
        Unknown element, no tabulated data (Z > 92) or energy out of range.
    """
    sym, _ = parse_element(element)
    el = periodictable.elements.symbol(sym)
    try:
        e = float(photon_energy)
    except (TypeError, ValueError):
        raise ParameterError("photon_energy", repr(photon_energy), "a photon energy in keV") from None
    f1, f2 = el.xray.scattering_factors(energy=e)
    if f1 is None or not (np.isfinite(f1) and np.isfinite(f2)):
        raise InputError(f"anomalous terms of '{element}'",
                         f"no Henke table value at {e:g} keV for Z = {el.number}",
                         "Z <= 92 and a photon energy between 0.01 and 30 keV")
    return float(f1) - el.number, float(f2)


def form_factor(q, element, photon_energy=None, anomalous=False):
    """Atomic X-ray form factor of one element or ion.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å, 0 <= q <= 75.4 (s <= 6 1/Å).
    element : str
        Element or ion symbol: "Ir", "Cl", "O", "Fe2+", "O2-", "Cl-".
    photon_energy : float, optional
        Photon energy, keV; needed when ``anomalous`` is true.
    anomalous : bool
        Add f' + i f'' at ``photon_energy`` (q-independent).

    Returns
    -------
    ndarray, shape (nq,)
        f0(q) in e.u., float64; complex128 f0 + f' + i f'' when ``anomalous``.

    Raises
    ------
    InputError
        Unknown symbol or ion, q out of range, untabulated energy.
    ParameterError
        ``anomalous`` without a ``photon_energy`` (or one that is not a number).
    """
    q = _check_q(q, f"form factor of '{element}'")
    f = _f0(q, element)
    if anomalous:
        if photon_energy is None:
            raise ParameterError("photon_energy", "None with anomalous=True", "a photon energy in keV")
        f1, f2 = anomalous_terms(element, photon_energy)
        f = f + (f1 + 1j * f2)
    return f


def form_factor_table(q, elements, photon_energy=None, anomalous=False):
    """Form factors of the distinct elements in a list.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    elements : sequence of str, length N
        Element or ion symbol of each atom.
    photon_energy : float, optional
        Photon energy, keV (for ``anomalous``).
    anomalous : bool
        Include f' + i f''.

    Returns
    -------
    unique : list of str, length n_unique
        Distinct symbols in order of first appearance (as given).
    table : ndarray, shape (n_unique, nq)
        ``table[k]`` is ``form_factor(q, unique[k], ...)``; float64, or complex128
        when ``anomalous``.
    """
    unique = list(dict.fromkeys(str(e) for e in elements))
    q = _check_q(q, "form factor table")
    dtype = np.complex128 if anomalous else np.float64
    table = np.empty((len(unique), q.size), dtype=dtype)
    for k, el in enumerate(unique):
        table[k] = form_factor(q, el, photon_energy=photon_energy, anomalous=anomalous)
    return unique, table


# ---------------------------------------------------------------------------
# Incoherent (Compton) scattering function
# ---------------------------------------------------------------------------

_BOHR = constants.physical_constants["Bohr radius"][0] * 1e10  # Å
#: Slater's effective principal quantum numbers n* for n = 1..7.
_NSTAR = {1: 1.0, 2: 2.0, 3: 3.0, 4: 3.7, 5: 4.0, 6: 4.2, 7: 4.4}
#: Subshells (n, l) in Madelung filling order.
_MADELUNG = sorted(((n, ell) for n in range(1, 8) for ell in range(0, min(n, 4))),
                   key=lambda nl: (nl[0] + nl[1], nl[0]))
_R = np.geomspace(1e-5, 40.0, 1600)  # radial grid, Å
_W = np.empty_like(_R)  # trapezoid weights on the grid
_W[1:-1] = 0.5 * (_R[2:] - _R[:-2])
_W[0] = 0.5 * (_R[1] - _R[0])
_W[-1] = 0.5 * (_R[-1] - _R[-2])


def _configuration(n_electrons):
    """Ground-state occupation [(n, ell, k)] by the Madelung rule."""
    out, left = [], n_electrons
    for n, ell in _MADELUNG:
        if left <= 0:
            break
        k = min(left, 2 * (2 * ell + 1))
        out.append((n, ell, k))
        left -= k
    return out


def _slater_exponents(z, config):
    """Orbital exponents zeta (1/bohr) by Slater's screening rules."""
    def group(n, ell):
        return (n, 0 if ell < 2 else ell)  # (ns,np) share a group; nd, nf are their own

    zetas = []
    for n, ell, _ in config:
        g = group(n, ell)
        shield = 0.0
        for n2, l2, k2 in config:
            count = k2 - 1 if (n2, l2) == (n, ell) else k2
            g2 = group(n2, l2)
            if g2 == g:
                shield += (0.30 if n == 1 else 0.35) * count
            elif ell < 2:
                if n2 == n - 1:
                    shield += 0.85 * count
                elif n2 < n - 1:
                    shield += 1.00 * count
            elif n2 < n or (n2 == n and g2[1] < ell):
                shield += 1.00 * count
        zetas.append((z - shield) / _NSTAR[n])
    return zetas


def _threej_000(l1, l2, big_l):
    """Wigner 3j symbol (l1 l2 L; 0 0 0) (Edmonds, Angular Momentum, eq. 3.7.17)."""
    j = l1 + l2 + big_l
    if j % 2 or big_l > l1 + l2 or big_l < abs(l1 - l2):
        return 0.0
    g = j // 2
    num = factorial(j - 2 * l1) * factorial(j - 2 * l2) * factorial(j - 2 * big_l)
    return ((-1) ** g * np.sqrt(num / factorial(j + 1)) * factorial(g)
            / (factorial(g - l1) * factorial(g - l2) * factorial(g - big_l)))


@lru_cache(maxsize=64)
def _orbitals(z, n_electrons):
    """Occupations and orthonormal radial functions R_nl(r) on ``_R``."""
    config = _configuration(n_electrons)
    zetas = _slater_exponents(z, config)
    radial = []
    for (n, _, _), zeta in zip(config, zetas, strict=True):
        ns = _NSTAR[n]
        # r^(n*-1) exp(-zeta r / a0), evaluated in log space to avoid overflow
        with np.errstate(divide="ignore"):
            rr = np.exp((ns - 1.0) * np.log(_R) - max(zeta, 1e-3) * _R / _BOHR)
        radial.append(rr)
    for i, (_, ell, _) in enumerate(config):  # Gram-Schmidt within each l, inner shells first
        for j in range(i):
            if config[j][1] == ell:
                radial[i] = radial[i] - np.sum(_W * _R**2 * radial[i] * radial[j]) * radial[j]
        radial[i] = radial[i] / np.sqrt(np.sum(_W * _R**2 * radial[i] ** 2))
    return config, np.array(radial)


def incoherent(q, element):
    """Incoherent (Compton) scattering function S(q) of an atom or ion.

    Waller-Hartree formula with Slater-rule orbitals (see the module notes for
    sources and accuracy). S(0) = 0 and S -> number of electrons at large q.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    element : str
        Element or ion symbol.

    Returns
    -------
    ndarray, shape (nq,)
        S(q), e.u. (per atom, in units of the Thomson cross-section), float64.
    """
    q = _check_q(q, f"incoherent scattering of '{element}'")
    # the same atoms on the same q grid are asked for again and again (scaling, synthesis, every
    # analysis): the orbital integrals are computed once per (element, q grid)
    return _incoherent_on_grid(str(element), np.ascontiguousarray(q, dtype=np.float64).tobytes()).copy()


@lru_cache(maxsize=256)
def _incoherent_on_grid(element: str, q_bytes: bytes) -> np.ndarray:
    """:func:`incoherent` on the q grid given as float64 bytes (read-only result, cached)."""
    q = np.frombuffer(q_bytes, dtype=np.float64)
    sym, charge = parse_element(element)
    z = periodictable.elements.symbol(sym).number
    n_el = z - charge
    if n_el < 1:
        return np.zeros_like(q)
    config, radial = _orbitals(z, n_el)
    ls = np.array([ell for _, ell, _ in config])
    occ = np.array([k / (2.0 * (2 * ell + 1)) for _, ell, k in config])  # per spin-orbital
    qr = np.multiply.outer(q, _R)
    s = np.full(q.shape, float(n_el))
    norb = len(config)
    for big_l in range(0, 2 * int(ls.max()) + 1):
        pairs = [(a, b) for a in range(norb) for b in range(a, norb)
                 if _threej_000(ls[a], ls[b], big_l) != 0.0]
        if not pairs:
            continue
        jl = spherical_jn(big_l, qr) * (_W * _R**2)
        prod = np.array([radial[a] * radial[b] for a, b in pairs]).T  # (nr, npairs)
        integral = jl @ prod  # (nq, npairs)
        for p, (a, b) in enumerate(pairs):
            la, lb = ls[a], ls[b]
            t = ((2 * la + 1) * (2 * lb + 1) * (2 * big_l + 1)
                 * _threej_000(la, lb, big_l) ** 2 * integral[:, p] ** 2)
            s -= (2.0 if a == b else 4.0) * occ[a] * occ[b] * t
            if a == b and big_l == 0:
                # an electron's own term counts fully, not as occupancy squared
                s -= 2.0 * (occ[a] - occ[a] ** 2) * (2 * la + 1) * integral[:, p] ** 2
    out = np.clip(s, 0.0, None)
    out.setflags(write=False)
    return out


# ---------------------------------------------------------------------------
# Excluded volume (dummy atoms)
# ---------------------------------------------------------------------------

#: Electron density of liquid water at 298 K, e/Å^3 (1 g/cm^3, 10 e per 18.015 g/mol).
WATER_ELECTRON_DENSITY = 10.0 * constants.N_A / 18.015 * 1e-24


def displaced_volume(element):
    """Volume of solvent displaced by an atom, Å^3.

    The sphere of the atom's van der Waals radius, V = 4/3 pi r^3, with radii from
    Alvarez, Dalton Trans. 42, 8617 (2013) (``ase.data.vdw_alvarez``), falling back
    to the radii collected in ``ase.data.vdw`` (Bondi 1964 and others) where Alvarez
    gives none. Ions take the neutral atom's radius.

    Parameters
    ----------
    element : str
        Element or ion symbol.

    Returns
    -------
    float
        Volume, Å^3.
    """
    from ase.data import vdw, vdw_alvarez

    z = atomic_number(element)
    radius = np.nan
    for table in (vdw_alvarez.vdw_radii, vdw.vdw_radii):
        if z < len(table) and np.isfinite(table[z]):
            radius = float(table[z])
            break
    if not np.isfinite(radius):
        raise InputError(f"element '{element}'", "no tabulated van der Waals radius",
                         "an element with a radius in ase.data.vdw_alvarez or ase.data.vdw")
    return 4.0 / 3.0 * np.pi * radius**3


def dummy_form_factor(q, element, solvent_density=WATER_ELECTRON_DENSITY):
    """Form factor of the solvent displaced by an atom (a Gaussian dummy atom).

    g(q) = rho0 V exp(-V^(2/3) q^2 / (4 pi)) (Fraser, MacRae & Suzuki, J. Appl.
    Cryst. 11, 693 (1978)), V from :func:`displaced_volume`. The solute's effective
    form factor in solution is f(q) - g(q).

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    element : str
        Element or ion symbol.
    solvent_density : float
        Bulk solvent electron density rho0, e/Å^3 (water: 0.334).

    Returns
    -------
    ndarray, shape (nq,)
        g(q), e.u., float64.
    """
    q = _check_q(q, f"dummy atom of '{element}'")
    volume = displaced_volume(element)
    return solvent_density * volume * np.exp(-volume ** (2.0 / 3.0) * q**2 / (4.0 * np.pi))
