"""Tests of movieproc.config: loading, --set overrides, schema validation and its errors."""

import copy
from pathlib import Path

import pytest
import yaml

from movieproc import cli
from movieproc import config as C
from movieproc import resources
from movieproc.errors import ConfigError

SCHEMA = yaml.safe_load(resources.schema("config").read_text())


def _defaults(schema_props, prefix=""):
    """(dotted key, default) of every leaf property with a default in the schema file."""
    for name, sub in schema_props.items():
        key = f"{prefix}{name}"
        if sub.get("type") == "object" and "properties" in sub:
            yield from _defaults(sub["properties"], key + ".")
        elif "default" in sub:
            yield key, sub["default"]


def _get(config, dotted):
    node = config
    for part in dotted.split("."):
        node = node[part]
    return node


def _minimal(tmp_path, text="run:\n  files: [a.h5]\n"):
    p = tmp_path / "minimal.yaml"
    p.write_text(text)
    return p


# ------------------------------------------------------------------ loading and defaults

def test_demo_config_loads_and_records_its_file():
    cfg = C.load()
    assert cfg["provenance"]["config_file"] == str(resources.default_config())
    assert cfg["timing"]["sign"] == -1  # as written in config/config.yaml
    assert cfg["binning"]["mode"] == "edges"


def test_minimal_config_gets_every_schema_default(tmp_path):
    cfg = C.load(_minimal(tmp_path))
    leaves = [(k, v) for k, v in _defaults(SCHEMA["properties"]) if not k.startswith("run.")]
    assert len(leaves) > 20  # the schema file's own defaults, read independently of the loader
    for key, default in leaves:
        assert _get(cfg, key) == default, key
    assert cfg["run"]["files"] == ["a.h5"]
    assert cfg["run"]["generate"] is None


def test_validate_returns_a_new_dict():
    raw = {"run": {"files": ["x.h5"]}}
    before = copy.deepcopy(raw)
    out = C.validate(raw)
    assert raw == before
    assert out is not raw and "binning" in out


# ------------------------------------------------------------------ overrides

def test_overrides_are_parsed_as_yaml_and_recorded():
    ov = ["binning.mode=width", "binning.width_ps=0.1", "binning.start_ps=-1", "binning.stop_ps=2",
          "timing.sign=1", "timing.calibration_fs=[-1375.0, 2.75, 0.0005]", "run.name=my run",
          "selection.outliers.enabled=false"]
    cfg = C.load(overrides=ov)
    b = cfg["binning"]
    assert (b["mode"], b["width_ps"], b["start_ps"], b["stop_ps"]) == ("width", 0.1, -1, 2)
    assert isinstance(b["width_ps"], float) and isinstance(b["start_ps"], int)
    assert cfg["timing"]["sign"] == 1
    assert cfg["timing"]["calibration_fs"] == [-1375.0, 2.75, 0.0005]
    assert cfg["run"]["name"] == "my run"
    assert cfg["selection"]["outliers"]["enabled"] is False
    assert cfg["provenance"]["overrides"] == ov  # recorded in order


def test_apply_overrides_leaves_input_untouched_and_creates_sections():
    raw = {"run": {"files": ["a.h5"]}}
    out = C.apply_overrides(raw, ["selection.timing.min_amplitude=0.05"])
    assert raw == {"run": {"files": ["a.h5"]}}
    assert out["selection"]["timing"]["min_amplitude"] == 0.05


def test_override_value_with_equals_sign_keeps_the_rest():
    parts, value = C.parse_override("run.name=a=b")
    assert parts == ["run", "name"] and value == "a=b"


def test_override_exponent_float():
    # YAML 1.2 core schema: [-+]?(\.[0-9]+|[0-9]+(\.[0-9]*)?)([eE][-+]?[0-9]+)? is a float
    # (YAML 1.2 spec, tag resolution of the core schema; from memory); Python: float("1e-1") == 0.1.
    cfg = C.load(overrides=["binning.width_ps=1e-1", "timing.calibration_fs=[-1375.0, 2.75, 5e-4]"])
    assert cfg["binning"]["width_ps"] == 0.1
    assert cfg["timing"]["calibration_fs"][2] == 0.0005


# ------------------------------------------------------------------ errors

@pytest.mark.parametrize("override, key, found", [
    ("binning.width_ps=abc", "binning.width_ps", "abc"),
    ("binning.width_ps=-1", "binning.width_ps", "-1"),
    ("binning.width_ps=0", "binning.width_ps", "0"),
    ("compute.workers=true", "compute.workers", "True"),
    ("binning.count=2.5", "binning.count", "2.5"),
    ("timing.sign=2", "timing.sign", "2"),
    ("binning.mode=log", "binning.mode", "log"),
    ("binning=3", "binning", "3"),
    ("run.files=[]", "run.files", "[]"),
])
def test_wrong_type_or_range_names_the_key(override, key, found):
    with pytest.raises(ConfigError) as exc:
        C.load(overrides=[override])
    assert exc.value.key == key
    msg = str(exc.value)
    assert f"'{key}'" in msg and found in msg and "expected" in msg


@pytest.mark.parametrize("override, key", [
    ("binning.widht_ps=0.1", "binning.widht_ps"),
    ("foo=1", "foo"),
    ("selection.timing.min_amplitud=0.1", "selection.timing.min_amplitud"),
])
def test_unknown_key_is_named(override, key):
    with pytest.raises(ConfigError, match="unknown key") as exc:
        C.load(overrides=[override])
    assert f"'{key}'" in str(exc.value)


def test_unknown_key_in_file(tmp_path):
    p = _minimal(tmp_path, "run:\n  files: [a.h5]\ntiming:\n  sing: -1\n")
    with pytest.raises(ConfigError, match=r"'timing\.sing'.*unknown key"):
        C.load(p)


@pytest.mark.parametrize("override, match", [
    ("binning.width_ps", r"no '='"),
    ("=3", r"empty key part"),
    ("a..b=1", r"'a\.\.b'.*empty key part"),
    ("binning.width_ps=[1,", r"'binning\.width_ps'.*YAML cannot parse"),
    ("run.name.first=x", r"'run\.name'.*a str value"),
])
def test_bad_override_syntax(override, match):
    with pytest.raises(ConfigError, match=match):
        C.load(overrides=[override])


def test_inconsistent_binning_and_window():
    with pytest.raises(ConfigError, match=r"'binning\.edges_ps'.*strictly increasing"):
        C.load(overrides=["binning.mode=edges", "binning.edges_ps=[0, 2, 1]"])
    with pytest.raises(ConfigError, match=r"'binning\.edges_ps'.*no edges"):
        C.load(overrides=["binning.mode=edges", "binning.edges_ps=null"])
    with pytest.raises(ConfigError, match=r"'differences\.norm_q_range'.*\[4, 3\]"):
        C.load(overrides=["differences.norm_q_range=[4, 3]"])


def test_bad_config_files(tmp_path):
    with pytest.raises(ConfigError, match="no file"):
        C.load(tmp_path / "absent.yaml")
    with pytest.raises(ConfigError, match="YAML mapping"):
        C.load(_minimal(tmp_path, "- a\n- b\n"))
    with pytest.raises(ConfigError, match="does not parse"):
        C.load(_minimal(tmp_path, "run: [unclosed\n"))
    with pytest.raises(ConfigError, match=r"'run'.*'files' is a required property"):
        C.load(_minimal(tmp_path, "run:\n  name: x\n"))


# ------------------------------------------------------------------ through the command line

@pytest.mark.parametrize("args, needle", [
    (["--set", "binning.width_ps=abc"], "config key 'binning.width_ps': found 'abc'"),
    (["--set", "binning.widht_ps=0.1"], "config key 'binning.widht_ps': found an unknown key"),
    (["--set", "binning.width_ps"], "found no '='"),
    (["--set", "timing.sign=0"], "config key 'timing.sign'"),
])
def test_cli_reports_config_errors_and_writes_nothing(args, needle, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert cli.main(["run", *args]) == 2
    err = capsys.readouterr().err
    assert err.startswith("movieproc: error: ")
    assert needle in err
    assert list(tmp_path.iterdir()) == []  # nothing written, no workflow started


# ------------------------------------------------------------------ shipped files and their paths

def test_shipped_demo_config_names_the_shipped_demo_files():
    cfg = C.load()
    ground = resources.demo_file("ground.xyz")
    assert ground.is_file() and cfg["model"]["ground"] == str(ground)
    assert cfg["model"]["trajectory"] == [str(resources.demo_file("excited_trajectory.xyz"))]
    assert cfg["solvent"]["differentials"] == str(resources.demo_file("solvent_differentials.csv"))
    assert cfg["run"]["generate"]["scenario"] == str(resources.demo_file("scenario.yaml"))
    # what the run writes stays relative to the working folder (config/config.yaml)
    assert cfg["run"]["files"] == ["resources/demo/run_000.h5", "resources/demo/run_001.h5"]
    assert cfg["output_dir"] == "results/demo"


def test_user_given_demo_paths_stay_relative_to_the_working_folder(tmp_path):
    # an override, and a user's own copy of the demo config, name files in the user's folder
    cfg = C.load(overrides=["model.ground=demo_data/ground.xyz"])
    assert cfg["model"]["ground"] == "demo_data/ground.xyz"
    own = tmp_path / "my.yaml"
    own.write_text(resources.default_config().read_text())
    assert C.load(own)["model"]["ground"] == "demo_data/ground.xyz"


def test_resources_lie_in_one_data_folder():
    root = resources.data_root()
    for path in (resources.workflow_file(), resources.default_config(), resources.process_config(),
                 resources.schema("config"), resources.schema("detector"), resources.schema("analysis"),
                 resources.demo_file("scenario.yaml"), resources.profile("cluster") / "config.yaml"):
        assert path.is_file() and root in path.parents, path


def test_shipped_profile_is_found_by_name_from_any_folder(tmp_path, monkeypatch):
    from movieproc.workflow import profile_file

    monkeypatch.chdir(tmp_path)
    assert profile_file("workflow/profiles/cluster") == resources.profile("cluster") / "config.yaml"
    own = tmp_path / "workflow" / "profiles" / "cluster"
    own.mkdir(parents=True)
    (own / "config.yaml").write_text("executor: local\n")
    assert profile_file("workflow/profiles/cluster") == Path("workflow/profiles/cluster/config.yaml")


# ------------------------------------------------------------------ movieproc init

def test_starter_config_holds_the_generic_settings_and_a_placeholder(tmp_path, capsys):
    from movieproc import init_command

    assert cli.main(["init", str(tmp_path / "new")]) == 0
    path = tmp_path / "new" / "config.yaml"
    assert f"movieproc run --config {path}" in capsys.readouterr().out
    text = path.read_text()
    starter, generic = C.read_file(path), C.read_file(resources.process_config())
    assert starter["run"]["files"] == [init_command.RUN_FILES_PLACEHOLDER]
    starter["run"]["files"] = generic["run"]["files"]
    assert starter == generic  # the values are the shipped generic settings
    for section in generic:  # each section has its comment just above it
        above = text.split(f"\n{section}:", 1)[0].rstrip().splitlines()[-1]
        assert above.startswith("# "), section
    with pytest.raises(ConfigError, match=r"run\.files\[0\].*placeholder"):
        C.load(path)


def test_check_and_run_refuse_the_placeholder(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert cli.main(["init", "."]) == 0
    capsys.readouterr()
    assert cli.main(["check", "--config", "config.yaml"]) == 1
    assert "run.files[0]" in capsys.readouterr().out
    assert cli.main(["run", "--config", "config.yaml"]) == 2
    assert "placeholder" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["config.yaml"]  # nothing run, nothing written


def test_init_keeps_an_existing_config_unless_forced(tmp_path, capsys):
    path = tmp_path / "config.yaml"
    path.write_text("mine\n")
    assert cli.main(["init", str(tmp_path)]) == 2
    assert "--force" in capsys.readouterr().err and path.read_text() == "mine\n"
    assert cli.main(["init", str(tmp_path), "--force"]) == 0
    assert C.read_file(path)["run"]["name"] == "run"
