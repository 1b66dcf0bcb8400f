"""Structure and trajectory files: round trips through ASE, times, and every bad input."""

import numpy as np
import pytest

from movieproc.errors import InputError
from movieproc.io.structures import read_ensemble, read_structure, read_trajectory, write_trajectory

ELEMENTS = ["Ir", "Ir", "Cl", "Cl", "C", "O", "C", "O", "C", "O"]


def frames(n=4, seed=0):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, len(ELEMENTS), 3)) * 2.0


def test_extxyz_round_trip_with_times(tmp_path):
    pos = frames()
    times = np.array([-0.1, 0.0, 0.05, 0.2])
    path = tmp_path / "traj.xyz"
    write_trajectory(path, ELEMENTS, pos, times)
    traj = read_trajectory(path)
    assert traj.elements == tuple(ELEMENTS)
    assert traj.positions.shape == (4, 10, 3) and traj.positions.dtype == np.float64
    # ASE writes extended XYZ coordinates with 8 decimals: round trip within 5e-9 Å
    np.testing.assert_allclose(traj.positions, pos, atol=5e-9)
    np.testing.assert_allclose(traj.times, times, atol=1e-12)


def test_ase_reads_what_we_write(tmp_path):
    import ase.io

    pos = frames(2)
    path = tmp_path / "t.xyz"
    write_trajectory(path, ELEMENTS, pos, [0.0, 1.5])
    atoms = ase.io.read(str(path), ":")  # reference: ASE's own reader
    assert [a.info["time_ps"] for a in atoms] == [0.0, 1.5]
    np.testing.assert_allclose(atoms[1].get_positions(), pos[1], atol=5e-9)


def test_ase_written_multimodel_pdb(tmp_path):
    import ase.io
    from ase import Atoms

    pos = frames(3)
    path = tmp_path / "models.pdb"
    ase.io.write(str(path), [Atoms(ELEMENTS, positions=p) for p in pos])
    traj = read_trajectory(path)
    assert traj.positions.shape == (3, 10, 3)  # no trailing empty model
    assert traj.times is None
    np.testing.assert_allclose(traj.positions, pos, atol=5e-4)  # PDB keeps 3 decimals (Å)
    assert traj.elements == tuple(ELEMENTS)


def test_pdb_trailing_empty_model_dropped(tmp_path):
    path = tmp_path / "t.pdb"
    path.write_text(
        "MODEL        1\n"
        "ATOM      1 IR   MOL     1       0.000   0.000   0.000  1.00  0.00          IR\n"
        "ATOM      2 CL   MOL     1       2.300   0.000   0.000  1.00  0.00          CL\n"
        "ENDMDL\nMODEL        2\nENDMDL\nEND\n")
    elements, positions = read_structure(path)
    assert elements == ("Ir", "Cl")
    np.testing.assert_allclose(positions, [[0, 0, 0], [2.3, 0, 0]])


def test_plain_xyz_and_time_keys(tmp_path):
    path = tmp_path / "plain.xyz"
    path.write_text("2\nwater fragment\nO 0 0 0\nH 0 0 0.96\n")
    elements, pos = read_structure(path)
    assert elements == ("O", "H") and pos.shape == (2, 3)
    assert read_trajectory(path).times is None
    fs = tmp_path / "fs.xyz"
    fs.write_text("2\ntime_fs=150.0\nO 0 0 0\nH 0 0 0.96\n2\ntime_fs=250\nO 0 0 0\nH 0 0 0.97\n")
    np.testing.assert_allclose(read_trajectory(fs).times, [0.15, 0.25])  # 1 ps = 1000 fs
    unit = tmp_path / "unit.xyz"
    unit.write_text("2\ntime=2.0 time_unit=ps\nO 0 0 0\nH 0 0 0.96\n")
    np.testing.assert_allclose(read_trajectory(unit).times, [2.0])


def test_ensemble_stack(tmp_path):
    paths = []
    for k in range(3):
        p = tmp_path / f"m{k}.xyz"
        write_trajectory(p, ELEMENTS, frames(5, seed=k), np.arange(5) * 0.1)
        paths.append(p)
    ens = read_ensemble(paths)
    assert ens.positions.shape == (3, 5, 10, 3)
    np.testing.assert_allclose(ens.positions[2], frames(5, seed=2), atol=5e-9)
    np.testing.assert_allclose(ens.times, np.arange(5) * 0.1)
    assert ens.source == tuple(str(p) for p in paths)


# ---------------------------------------------------------------------------
# Bad inputs: each names the file and the frame
# ---------------------------------------------------------------------------

def _write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="no such file") as err:
        read_trajectory(tmp_path / "absent.xyz")
    assert "absent.xyz" in str(err.value)


def test_unknown_element_names_frame(tmp_path):
    p = _write(tmp_path, "bad.xyz", "2\n\nO 0 0 0\nH 0 0 1\n2\n\nO 0 0 0\nXx 0 0 1\n")
    with pytest.raises(InputError, match=r"bad.xyz, frame 1: found unknown element symbol 'Xx'"):
        read_trajectory(p)


def test_atom_count_differs(tmp_path):
    p = _write(tmp_path, "n.xyz", "2\n\nO 0 0 0\nH 0 0 1\n3\n\nO 0 0 0\nH 0 0 1\nH 0 1 0\n")
    with pytest.raises(InputError, match=r"n.xyz, frame 1: found 3 atoms; expected 2 atoms"):
        read_trajectory(p)


def test_element_order_differs(tmp_path):
    p = _write(tmp_path, "o.xyz", "2\n\nO 0 0 0\nH 0 0 1\n2\n\nH 0 0 0\nO 0 0 1\n")
    with pytest.raises(InputError, match=r"o.xyz, frame 1: found element H at atom 0"):
        read_trajectory(p)


def test_nan_coordinates(tmp_path):
    p = _write(tmp_path, "nan.xyz", "2\n\nO 0 0 0\nH 0 0 1\n2\n\nO 0 0 0\nH nan 0 1\n")
    with pytest.raises(InputError, match=r"nan.xyz, frame 1: found non-finite coordinates at atom 1"):
        read_trajectory(p)


def test_empty_structure(tmp_path):
    p = _write(tmp_path, "empty.xyz", "0\n\n")
    with pytest.raises(InputError, match=r"empty.xyz, frame 0: found no atoms"):
        read_trajectory(p)


def test_malformed_file(tmp_path):
    p = _write(tmp_path, "junk.xyz", "this is not\nan xyz file\n")
    with pytest.raises(InputError, match=r"junk.xyz, frame 0"):
        read_trajectory(p)


def test_ambiguous_or_partial_times(tmp_path):
    p = _write(tmp_path, "t.xyz", "1\ntime=5\nO 0 0 0\n")
    with pytest.raises(InputError, match=r"t.xyz, frame 0: found time=5"):
        read_trajectory(p)
    p = _write(tmp_path, "u.xyz", "1\ntime_ps=0.1\nO 0 0 0\n1\n\nO 0 0 1\n")
    with pytest.raises(InputError, match=r"u.xyz, frame 1: found a frame without a time"):
        read_trajectory(p)


def test_single_structure_refuses_trajectory(tmp_path):
    p = tmp_path / "two.xyz"
    write_trajectory(p, ["O"], np.zeros((2, 1, 3)))
    with pytest.raises(InputError, match="2 frames"):
        read_structure(p)


def test_ensemble_mismatches(tmp_path):
    a, b, c, d = (tmp_path / f"{k}.xyz" for k in "abcd")
    write_trajectory(a, ELEMENTS, frames(3), [0, 1, 2])
    write_trajectory(b, ELEMENTS, frames(4), [0, 1, 2, 3])
    write_trajectory(c, ELEMENTS[::-1], frames(3), [0, 1, 2])
    write_trajectory(d, ELEMENTS, frames(3), [0, 1, 2.5])
    with pytest.raises(InputError, match="4 frames"):
        read_ensemble([a, b])
    with pytest.raises(InputError, match="same order"):
        read_ensemble([a, c])
    with pytest.raises(InputError, match="frame times"):
        read_ensemble([a, d])
    with pytest.raises(InputError, match="no files"):
        read_ensemble([])


def test_writer_refuses_bad_input(tmp_path):
    with pytest.raises(InputError, match="unknown element symbol"):
        write_trajectory(tmp_path / "x.xyz", ["Xx"], np.zeros((1, 1, 3)))
    with pytest.raises(InputError, match="non-finite"):
        write_trajectory(tmp_path / "x.xyz", ["O"], np.full((1, 1, 3), np.nan))
    with pytest.raises(InputError, match="times"):
        write_trajectory(tmp_path / "x.xyz", ["O"], np.zeros((2, 1, 3)), [0.0])
    with pytest.raises(InputError, match="suffix"):
        write_trajectory(tmp_path / "x.cif", ["O"], np.zeros((1, 1, 3)))
    assert not list(tmp_path.iterdir())  # nothing half-written


def test_writer_does_not_modify_inputs(tmp_path):
    pos = frames(2)
    keep = pos.copy()
    times = np.array([0.0, 0.1])
    write_trajectory(tmp_path / "k.xyz", ELEMENTS, pos, times)
    np.testing.assert_array_equal(pos, keep)
    np.testing.assert_array_equal(times, [0.0, 0.1])
