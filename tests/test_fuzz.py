"""Property tests on damaged and odd input: the run-file reader and the pre-flight checks on truncated
files, flipped bytes, wrong dtypes, shapes and attributes; the ``process`` config from random
paths and names; the config loader on random YAML. The property is the same everywhere: the only
exceptions that reach a user are the project's own (MovieprocError subclasses), each naming the
input; and a path or name comes back exactly as given.

Examples per property (``max_examples``, derandomized in conftest): truncation 40, flipped bytes 60,
wrong datasets 60, paths 100, config YAML 100, overrides 100: 460 in all.
"""

import io
import os
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import run_datasets, write_h5
from movieproc import checks, cli
from movieproc import config as C
from movieproc import workflow as W
from movieproc.errors import MovieprocError
from movieproc.io import runfile

FAST = dict(suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
PROCESS = C.load(C.ROOT / "config" / "process.yaml", ["compute.progress=false", "selection.outliers.window=20"])


def _valid_bytes(n=40, nq=12) -> bytes:
    buf = io.BytesIO()
    with h5py.File(buf, "w") as h5:
        for name, values in run_datasets(n=n, nq=nq).items():
            h5.create_dataset(name, data=values)
    return buf.getvalue()


VALID = _valid_bytes()


def read_everything(path):
    """What a run does with a run file before and during ingest: inspect, pre-flight, read table and data."""
    info = runfile.inspect_run([path])
    checks.check([str(path)], PROCESS)
    table = runfile.read_table(info)
    assert table["pulse_id"].shape == (info.n_shots,)
    if info.mode == "curves":
        runfile.read_curves(info, 0, info.n_shots)
    else:
        runfile.read_frames(info, 0, info.n_shots)


def only_project_errors(path):
    try:
        read_everything(path)
    except MovieprocError as exc:
        assert str(exc)  # every project error says something
        assert "\n" not in str(exc)


@settings(max_examples=40, **FAST)
@given(cut=st.integers(min_value=0, max_value=len(VALID) - 1))
def test_truncated_run_files_raise_only_project_errors(cut, tmp_path):
    path = tmp_path / f"cut{cut}.h5"
    path.write_bytes(VALID[:cut])
    with pytest.raises(MovieprocError):  # a truncated HDF5 file never passes as a run
        read_everything(path)


@settings(max_examples=60, **FAST)
@given(flips=st.lists(st.tuples(st.integers(min_value=0, max_value=len(VALID) - 1),
                                st.integers(min_value=1, max_value=255)), min_size=1, max_size=24))
def test_flipped_bytes_raise_only_project_errors(flips, tmp_path):
    data = bytearray(VALID)
    for pos, mask in flips:
        data[pos] ^= mask
    path = tmp_path / "flipped.h5"
    path.write_bytes(bytes(data))
    only_project_errors(path)


#: Attribute names and text values HDF5 can store (no NUL; h5py writes str as UTF-8).
ATTR_TEXT = st.text(alphabet=st.characters(min_codepoint=33, max_codepoint=0x2FF), min_size=1, max_size=8)
CONTRACT = ["shots/pulse_id", "shots/stage_delay", "shots/pump_on", "shots/pulse_energy", "shots/timing_edge",
            "shots/timing_amplitude", "q", "curves"]


def _replacement(kind: str, original: np.ndarray, rng: np.random.Generator):
    n = original.shape[0] if original.ndim else 1
    return {
        "strings": np.array([b"x"] * n),
        "2d": np.zeros((n, 2)),
        "short": original[: max(n - 3, 0)],
        "scalar": np.float64(1.5),
        "compound": np.zeros(n, dtype=[("a", "f8"), ("b", "i4")]),
        "complex": np.zeros(original.shape, dtype=np.complex64),
        "nan": np.full(original.shape, np.nan),
        "empty": original[:0],
        "shuffled": rng.permutation(original),
        "bool": np.ones(original.shape, dtype=bool),
    }[kind]


@settings(max_examples=60, **FAST)
@given(name=st.sampled_from(CONTRACT + ["frames"]),
       kind=st.sampled_from(["strings", "2d", "short", "scalar", "compound", "complex", "nan", "empty", "shuffled",
                             "bool", "group", "delete"]),
       attrs=st.dictionaries(ATTR_TEXT, st.one_of(st.integers(-2**63, 2**63 - 1), ATTR_TEXT), max_size=3),
       seed=st.integers(min_value=0, max_value=2**16))
def test_wrong_dtypes_shapes_and_attributes_raise_only_project_errors(name, kind, attrs, seed, tmp_path):
    rng = np.random.default_rng(seed)
    data = run_datasets(n=30, nq=10, seed=seed)
    if name == "frames":  # frames where curves were: a frames-mode file, damaged below
        data.pop("curves")
        data.pop("q")
        data["frames"] = rng.integers(0, 100, (30, 6, 6)).astype(np.uint16)
    path = tmp_path / "odd.h5"
    write_h5(path, {k: v for k, v in data.items() if not (k == name and kind in ("group", "delete"))})
    with h5py.File(path, "a") as h5:
        if kind == "group":
            h5.create_group(name)
        elif kind != "delete":
            del h5[name]
            h5.create_dataset(name, data=_replacement(kind, data[name], rng))
        target = h5[name] if name in h5 else h5
        for key, value in attrs.items():
            target.attrs[key] = value
    only_project_errors(path)


# ------------------------------------------------------------------ paths and names

PATH_TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                    min_size=1, max_size=24).filter(lambda t: t.strip() and Path(t) != Path(Path(t).anchor or "."))


@pytest.fixture(scope="module")
def one_run(tmp_path_factory):
    return write_h5(tmp_path_factory.mktemp("fuzzrun") / "run.h5", run_datasets(n=30))


@pytest.mark.slow
@settings(max_examples=100, **FAST)
@given(out=PATH_TEXT, name=st.text(max_size=16).filter(lambda t: "\x00" not in t))
def test_cli_paths_and_names_round_trip(out, name, one_run, tmp_path):
    args = cli.build_parser().parse_args(["process", str(one_run), "--out", out, "--name", name])
    cfg = cli.process_config(args)
    assert cfg["output_dir"] == out and cfg["run"]["name"] == name
    assert W.output_folder(cfg, tmp_path) == Path(os.path.abspath(tmp_path / out))
    # through the config file Snakemake reads, the same strings come back
    back = yaml.safe_load(W.write_effective_config(cfg, path=tmp_path / "cfg.yaml").read_text(encoding="utf-8"))
    assert back["output_dir"] == out and back["run"]["name"] == name
    view = W.snakemake_view(cfg, tmp_path, create=False)
    assert "{" not in view["output_dir"] and "}" not in view["output_dir"]
    if "{" not in out and "}" not in out:
        assert view["output_dir"] == out
    else:  # a link without braces that leads to the same folder
        assert os.readlink(view["output_dir"]) == str(W.output_folder(cfg, tmp_path))


# ------------------------------------------------------------------ the config loader

YAML_VALUES = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=10)),
    lambda children: st.one_of(st.lists(children, max_size=4),
                               st.dictionaries(st.one_of(st.text(max_size=10), st.integers()), children, max_size=4)),
    max_leaves=12)
SECTIONS = st.sampled_from(["run", "output_dir", "compute", "selection", "timing", "binning", "differences",
                            "render", "provenance", "detector", "fit", "model", "bogus"])


@pytest.mark.slow
@settings(max_examples=100, **FAST)
@given(doc=st.one_of(
    st.text(max_size=200),
    st.dictionaries(SECTIONS, YAML_VALUES, max_size=5).map(lambda d: yaml.safe_dump(d, allow_unicode=True)),
    st.dictionaries(SECTIONS, YAML_VALUES, max_size=5).map(
        lambda d: yaml.safe_dump({"run": {"files": ["a.h5"]}, **d}, allow_unicode=True)),
))
def test_config_loader_on_random_yaml_raises_only_config_errors(doc, tmp_path):
    path = tmp_path / "random.yaml"
    path.write_text(doc, encoding="utf-8")
    try:
        cfg = C.load(path)
    except MovieprocError as exc:
        assert "\n" not in str(exc) or "config key" in str(exc)
    else:
        assert isinstance(cfg["output_dir"], str) and cfg["run"]["files"]


@settings(max_examples=100, **FAST)
@given(texts=st.lists(st.text(max_size=40), min_size=1, max_size=3))
def test_random_overrides_raise_only_config_errors(texts):
    try:
        C.load(overrides=texts)
    except MovieprocError:
        pass
