"""Debye scattering: closed forms, brute force, histogram accuracy, invariances."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from movieproc.errors import InputError
from movieproc.scattering import debye as D
from movieproc.scattering import formfactors as ff

Q = np.linspace(0.0, 10.0, 301)


def demo_complex(ir_ir=2.90):
    """An invented dinuclear iridium complex: Ir2(mu-Cl)2(CO)3, 10 atoms (Å)."""
    h = ir_ir / 2
    elements = ["Ir", "Ir", "Cl", "Cl", "C", "O", "C", "O", "C", "O"]
    positions = np.array([
        [-h, 0.0, 0.0], [h, 0.0, 0.0],
        [0.0, 1.70, 0.0], [0.0, -1.70, 0.0],
        [-h - 1.85, 0.0, 0.0], [-h - 3.00, 0.0, 0.0],
        [h + 1.85, 0.0, 0.0], [h + 3.00, 0.0, 0.0],
        [-h, 0.0, 1.85], [-h, 0.0, 3.00],
    ])
    return elements, positions


def brute_force(q, positions, elements):
    """Independent double loop in float64: sum_ij f_i f_j sin(q r_ij)/(q r_ij)."""
    f = {e: ff.form_factor(q, e) for e in set(elements)}
    s = np.zeros_like(q)
    for i in range(len(elements)):
        for j in range(len(elements)):
            r = np.linalg.norm(positions[i] - positions[j])
            qr = q * r
            with np.errstate(invalid="ignore", divide="ignore"):
                sinc = np.where(qr == 0, 1.0, np.sin(qr) / np.where(qr == 0, 1.0, qr))
            s += f[elements[i]] * f[elements[j]] * sinc
    return s


def nearest_bin_debye(q, positions, elements, dr):
    """Histogram path with nearest-bin assignment (what linear sharing replaces)."""
    f = {e: ff.form_factor(q, e) for e in set(elements)}
    s = sum(f[e] ** 2 for e in elements)
    for i in range(len(elements)):
        for j in range(i + 1, len(elements)):
            rk = np.round(np.linalg.norm(positions[i] - positions[j]) / dr) * dr
            s = s + 2 * f[elements[i]] * f[elements[j]] * np.sinc(q * rk / np.pi)
    return s


def diatomic(q, f1, f2, r, sigma=0.0):
    # closed form, docs/METHODS.md sec 5 / Debye 1915: |f1|^2 + |f2|^2 + 2 Re(f1 f2*) sin(qr)/(qr)
    return (np.abs(f1) ** 2 + np.abs(f2) ** 2
            + 2 * np.real(f1 * np.conj(f2)) * np.sinc(q * r / np.pi) * np.exp(-sigma**2 * q**2 / 2))


# ---------------------------------------------------------------------------
# Closed forms and brute force
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("pair, r", [(("Ir", "Ir"), 2.9), (("Ir", "Cl"), 2.3456), (("C", "O"), 1.13)])
def test_diatomic_exact_path(pair, r):
    pos = np.array([[0.0, 0.0, 0.0], [0.3, -0.4, 0.0]])
    pos[1] *= r / np.linalg.norm(pos[1])
    ref = diatomic(Q, ff.form_factor(Q, pair[0]), ff.form_factor(Q, pair[1]), r)
    # float32 sinc: |error| <= ~6e-8 per pair (debye.py notes) -> 1e-6 of S is ample
    np.testing.assert_allclose(D.debye(Q, pos, pair), ref, rtol=0, atol=1e-6 * ref.max())


def test_diatomic_histogram_path_linear_interpolation():
    # linear sharing is linear interpolation of sinc(q r) between grid points:
    # |error| <= dr^2/8 max|d^2 sinc(qr)/dr^2| <= dr^2 q^2 / 24 (|sinc''(x)| <= 1/3)
    r, dr = 2.3456, 0.01
    pos = np.array([[0.0, 0.0, 0.0], [r, 0.0, 0.0]])
    f1, f2 = ff.form_factor(Q, "Ir"), ff.form_factor(Q, "Cl")
    got = D.debye_histogram(Q, pos, ["Ir", "Cl"], dr=dr)
    bound = 2 * f1 * f2 * dr**2 * Q**2 / 24 + 1e-6 * (f1**2 + f2**2)
    assert np.all(np.abs(got - diatomic(Q, f1, f2, r)) <= bound)


def test_damping_closed_form_both_paths():
    r, sigma = 2.9, 0.07
    pos = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, r]])
    f = ff.form_factor(Q, "Ir")
    ref = diatomic(Q, f, f, r, sigma)
    tol = 1e-6 * ref.max()
    np.testing.assert_allclose(D.debye(Q, pos, ["Ir", "Ir"], damping=sigma), ref, atol=tol)
    np.testing.assert_allclose(D.debye(Q, pos, ["Ir", "Ir"], damping={"Ir-Ir": sigma}), ref, atol=tol)
    np.testing.assert_allclose(D.debye(Q, pos, ["Ir", "Ir"], damping=np.full((2, 2), sigma)), ref, atol=tol)
    hist = D.debye_histogram(Q, pos, ["Ir", "Ir"], damping={("Ir", "Ir"): sigma})
    np.testing.assert_allclose(hist, ref, atol=1e-4 * ref.max())  # grid error, see above


def test_anomalous_and_excluded_volume_diatomic():
    r, e, rho0 = 2.5, 11.0, 0.334
    pos = np.array([[0.0, 0.0, 0.0], [r, 0.0, 0.0]])
    f1 = ff.form_factor(Q, "Ir", photon_energy=e, anomalous=True) - ff.dummy_form_factor(Q, "Ir", rho0)
    f2 = ff.form_factor(Q, "Cl", photon_energy=e, anomalous=True) - ff.dummy_form_factor(Q, "Cl", rho0)
    ref = diatomic(Q, f1, f2, r)
    got = D.debye(Q, pos, ["Ir", "Cl"], photon_energy=e, anomalous=True, excluded_volume=rho0)
    np.testing.assert_allclose(got, ref, atol=1e-6 * np.abs(ref).max())
    got_h = D.debye_histogram(Q, pos, ["Ir", "Cl"], photon_energy=e, anomalous=True, excluded_volume=rho0)
    np.testing.assert_allclose(got_h, ref, atol=1e-4 * np.abs(ref).max())


def test_random_cluster_against_brute_force():
    rng = np.random.default_rng(7)
    elements = list(rng.choice(["Ir", "Cl", "C", "O", "H", "N", "Fe"], 50))
    positions = rng.uniform(-6, 6, size=(50, 3))
    ref = brute_force(Q, positions, elements)
    # float32 sinc per pair (|err| <= ~6e-8 f_i f_j): 1e-6 of max S
    np.testing.assert_allclose(D.debye(Q, positions, elements), ref, atol=1e-6 * ref.max())
    np.testing.assert_allclose(D.debye(Q, positions, elements, max_chunk=301 * 37), ref,
                               atol=1e-6 * ref.max())  # chunking does not change the sum
    # docs/METHODS.md sec 5: linear sharing at dr = 0.01 keeps errors ~1e-5 of S; require 1e-4
    hist = D.debye_histogram(Q, positions, elements, dr=0.01)
    assert np.abs(hist - ref).max() < 1e-4 * np.abs(ref).max()


def test_sinc_table_float32_against_float64():
    q = np.linspace(0, 25, 400)
    r = np.arange(0, 6000) * 0.01
    ref = np.sinc(np.multiply.outer(r, q) / np.pi)  # float64 numpy reference
    # rounding x = q r to float32 changes sin(x)/x by <= ~6e-8 (debye.py notes); allow 2e-7
    assert np.abs(D.sinc_table(q, r) - ref).max() < 2e-7


# ---------------------------------------------------------------------------
# Histograms: linear sharing and its accuracy on difference curves
# ---------------------------------------------------------------------------

def test_histograms_conserve_count_and_mean_distance():
    rng = np.random.default_rng(3)
    elements = list(rng.choice(["Ir", "Cl", "O"], 40))
    positions = rng.normal(size=(40, 3)) * 3
    h = D.distance_histograms(positions, elements, dr=0.05)
    from scipy.spatial.distance import pdist
    d = pdist(positions)
    # linear sharing conserves the number of pairs and their summed distance exactly
    assert h.counts.sum() == pytest.approx(len(d), rel=1e-12)
    assert (h.counts * h.r).sum() == pytest.approx(d.sum(), rel=1e-12)
    types = np.array([h.elements.index(e) for e in elements])
    i, j = np.triu_indices(40, k=1)
    for p, (a, b) in enumerate(h.pairs):
        n_ab = np.sum(((types[i] == a) & (types[j] == b)) | ((types[i] == b) & (types[j] == a)))
        assert h.counts[p].sum() == pytest.approx(n_ab, rel=1e-12)


def test_frames_histograms_equal_single_frames():
    rng = np.random.default_rng(4)
    frames = rng.normal(size=(3, 12, 3)) * 2
    els = ["Ir", "Cl", "C", "O"] * 3
    r_max = D.default_r_max(frames, 0.01)
    h = D.distance_histograms(frames, els, r_max=r_max)
    for k in range(3):
        np.testing.assert_array_equal(h.counts[k], D.distance_histograms(frames[k], els, r_max=r_max).counts)


def test_difference_linear_sharing_meets_1e3_nearest_bin_does_not():
    q = np.linspace(0.5, 8.0, 300)
    els, ground = demo_complex(2.90)
    _, excited = demo_complex(2.80)  # Ir-Ir contracted by 0.1 Å, ligands follow
    exact = D.debye(q, excited, els) - D.debye(q, ground, els)
    linear = D.debye_histogram(q, excited, els) - D.debye_histogram(q, ground, els)
    nearest = nearest_bin_debye(q, excited, els, 0.01) - nearest_bin_debye(q, ground, els, 0.01)
    scale = np.abs(exact).max()
    # issue requirement: histogram path within 1e-3 of max|dS| at dr = 0.01 Å
    assert np.abs(linear - exact).max() < 1e-3 * scale
    # nearest-bin moves each distance by up to dr/2 = 0.005 Å, ~5 % of the 0.1 Å change
    # (docs/METHODS.md sec 5: ~1 % of a difference signal): it must miss the 1e-3 target
    assert np.abs(nearest - exact).max() > 1e-3 * scale


def test_histogram_range_errors():
    els, pos = demo_complex()
    with pytest.raises(InputError, match="r_max"):
        D.distance_histograms(pos, els, r_max=3.0)
    with pytest.raises(InputError, match="dr"):
        D.distance_histograms(pos, els, dr=0.0)
    h = D.distance_histograms(pos, els)
    with pytest.raises(InputError, match="form_factors"):
        D.debye_from_histograms(Q, h, np.ones((2, Q.size)))


def test_bad_inputs():
    els, pos = demo_complex()
    with pytest.raises(InputError, match="element symbols"):
        D.debye(Q, pos, els[:-1])
    with pytest.raises(InputError, match="shape"):
        D.debye(Q, pos[:, :2], els)
    bad = pos.copy()
    bad[3, 1] = np.nan
    with pytest.raises(InputError, match="atom 3"):
        D.debye(Q, bad, els)
    with pytest.raises(InputError, match="atom 3"):
        D.debye_histogram(Q, bad, els)
    with pytest.raises(InputError, match="no atoms"):
        D.debye(Q, np.empty((0, 3)), [])
    with pytest.raises(InputError, match="'Xx'"):
        D.debye(Q, pos, ["Xx"] + els[1:])
    with pytest.raises(InputError, match="damping"):
        D.debye(Q, pos, els, damping=-0.1)


def test_inputs_not_modified():
    els, pos = demo_complex()
    keep_pos, keep_q, keep_els = pos.copy(), Q.copy(), list(els)
    D.debye(Q, pos, els, damping=0.05)
    D.debye_histogram(Q, pos, els)
    np.testing.assert_array_equal(pos, keep_pos)
    np.testing.assert_array_equal(Q, keep_q)
    assert els == keep_els


# ---------------------------------------------------------------------------
# Invariances (property tests)
# ---------------------------------------------------------------------------

structures = st.integers(min_value=2, max_value=9).flatmap(
    lambda n: st.tuples(
        st.lists(st.sampled_from(["Ir", "Cl", "C", "O", "H"]), min_size=n, max_size=n),
        st.lists(st.tuples(*[st.floats(-5, 5, allow_nan=False)] * 3), min_size=n, max_size=n),
        st.integers(0, 2**32 - 1),
    )
)
QP = np.linspace(0.0, 8.0, 60)


def _s(positions, elements):
    return D.debye(QP, positions, elements), D.debye_histogram(QP, positions, elements)


@settings(max_examples=25, deadline=None)
@given(structures)
def test_invariant_under_permutation_rotation_translation(data):
    elements, coords, seed = data
    pos = np.array(coords, dtype=float)
    rng = np.random.default_rng(seed)
    exact, hist = _s(pos, elements)
    scale = np.abs(exact).max()
    perm = rng.permutation(len(elements))
    rot = Rotation.random(random_state=seed).as_matrix()
    shift = rng.uniform(-50, 50, size=3)
    moved = pos[perm] @ rot.T + shift
    moved_elements = [elements[k] for k in perm]
    exact2, hist2 = _s(moved, moved_elements)
    # distances agree to ~1e-14 Å; float32 sinc rounding may flip by one ulp (6e-8):
    # 1e-6 of max S for the exact path
    assert np.abs(exact2 - exact).max() <= 1e-6 * scale
    # linear sharing is continuous in r, so a 1e-14 Å change moves S by ~1e-12 of S
    assert np.abs(hist2 - hist).max() <= 1e-6 * scale


def test_single_atom_is_f_squared():
    # closed form: one atom scatters |f|^2 (no pairs)
    f = ff.form_factor(Q, "Ir", photon_energy=11.0, anomalous=True)
    for s in (D.debye(Q, [[1.0, 2.0, 3.0]], ["Ir"], photon_energy=11.0, anomalous=True),
              D.debye_histogram(Q, [[1.0, 2.0, 3.0]], ["Ir"], photon_energy=11.0, anomalous=True)):
        np.testing.assert_allclose(s, np.abs(f) ** 2, rtol=1e-12)
