"""Loading, overriding and validating the configuration.

The config is one YAML file checked against ``config/schemas/config.schema.yaml``
(JSON Schema draft 2020-12, with the detector section in
``detector.schema.yaml``; the shipped files are found by :mod:`movieproc.resources`).
Validation fills in defaults, so stages can rely on every key being present.
Command-line overrides are ``dotted.key=value`` strings whose values are parsed
as YAML; they are validated like the file and recorded under ``provenance.overrides``.
"""

from __future__ import annotations

import copy
import functools
import math
import re
from pathlib import Path

import jsonschema
import yaml

from . import resources
from .errors import ConfigError

#: The folder holding ``workflow/``, ``config/`` and ``demo_data/`` (the source checkout, or the installed
#: package's data; :func:`movieproc.resources.data_root`). Code asks :mod:`movieproc.resources` for files.
ROOT = resources.data_root()
#: The schema files' folder and the demo config (as :mod:`movieproc.resources` gives them).
SCHEMA_DIR = resources.schema("config").parent
DEFAULT_CONFIG = resources.default_config()
#: Start of a value a user must replace (``movieproc init`` writes run.files so); such a config is refused.
PLACEHOLDER = "FILL-IN"


class _Loader(yaml.SafeLoader):
    """YAML loader that also reads 1e-3 and 5E4 as floats (YAML 1.2), not strings."""


_Loader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"""^(?:[-+]?(?:[0-9][0-9_]*)\.[0-9_]*(?:[eE][-+]?[0-9]+)?
                |[-+]?(?:[0-9][0-9_]*)(?:[eE][-+]?[0-9]+)
                |\.[0-9_]+(?:[eE][-+][0-9]+)?
                |[-+]?\.(?:inf|Inf|INF)
                |\.(?:nan|NaN|NAN))$""", re.X),
    list("-+0123456789."),
)


def read_yaml(text: str):
    """Parse YAML text the way every movieproc file and override is read."""
    return yaml.load(text, Loader=_Loader)


def load_schema() -> dict:
    """The full config schema, detector section merged in (a fresh copy: callers may change it)."""
    return copy.deepcopy(_parsed_schema(tuple(str(resources.schema(name)) for name in ("config", "detector",
                                                                                         "analysis"))))


@functools.lru_cache(maxsize=4)
def _parsed_schema(paths: tuple) -> dict:
    # parsing the three YAML files takes ~0.1 s; a run validates its config several times
    config_path, detector_path, analysis_path = (Path(p) for p in paths)
    schema = yaml.safe_load(config_path.read_text(encoding="utf-8"))
    schema["properties"]["detector"] = yaml.safe_load(detector_path.read_text(encoding="utf-8"))
    schema["properties"].update(yaml.safe_load(analysis_path.read_text(encoding="utf-8"))["properties"])
    return schema


def parse_override(text: str):
    """Split ``dotted.key=value`` into (['dotted', 'key'], parsed value)."""
    if "=" not in text:
        raise ConfigError(text, "no '='", "an override of the form dotted.key=value")
    key, _, raw = text.partition("=")
    key = key.strip()
    if not key or any(not part for part in key.split(".")):
        raise ConfigError(key, "an empty key part", "dotted.key=value")
    try:
        value = read_yaml(raw)
    except yaml.YAMLError as exc:
        raise ConfigError(key, f"a value YAML cannot parse ({raw!r}: {exc})", "a YAML value") from None
    return key.split("."), value


def apply_overrides(config: dict, overrides) -> dict:
    """Return a copy of ``config`` with ``dotted.key=value`` overrides applied."""
    config = copy.deepcopy(config)
    for text in overrides or ():
        parts, value = parse_override(text)
        node = config
        for i, part in enumerate(parts[:-1]):
            child = node.get(part)
            if child is None:
                child = node[part] = {}
            elif not isinstance(child, dict):
                raise ConfigError(".".join(parts[: i + 1]), f"a {type(child).__name__} value",
                                  f"a section, to set '{'.'.join(parts)}'")
            node = child
        node[parts[-1]] = value
    if overrides:
        prov = config.get("provenance")
        prov = prov if isinstance(prov, dict) else {}
        config["provenance"] = prov
        earlier = prov.get("overrides")
        prov["overrides"] = (list(earlier) if isinstance(earlier, list) else []) + list(overrides)
    return config


def _extend_with_default(validator_class):
    validate_properties = validator_class.VALIDATORS["properties"]

    def set_defaults(validator, properties, instance, schema):
        if isinstance(instance, dict):
            for name, sub in properties.items():
                if "default" in sub and name not in instance:
                    instance[name] = copy.deepcopy(sub["default"])
        yield from validate_properties(validator, properties, instance, schema)

    return jsonschema.validators.extend(validator_class, {"properties": set_defaults})


def _is_finite_number(checker, instance) -> bool:
    """A JSON-schema ``number`` is a finite int or float: NaN and infinities are refused for every
    number-typed key, since no setting of this tool means "not a number"."""
    if isinstance(instance, bool) or not isinstance(instance, (int, float)):
        return False
    return math.isfinite(instance)


def _is_integer(checker, instance) -> bool:
    if isinstance(instance, bool):
        return False
    return isinstance(instance, int) or (isinstance(instance, float) and math.isfinite(instance)
                                         and instance.is_integer())


_TYPES = jsonschema.Draft202012Validator.TYPE_CHECKER.redefine_many(
    {"number": _is_finite_number, "integer": _is_integer})
_Validator = jsonschema.validators.extend(_extend_with_default(jsonschema.Draft202012Validator),
                                          type_checker=_TYPES)


def validate(config: dict) -> dict:
    """Validate a config against the schema and fill in defaults.

    Returns a new dict; raises :class:`ConfigError` naming the first bad key.
    """
    config = copy.deepcopy(config or {})
    _check_placeholders({key: value for key, value in config.items() if key != "provenance"})
    validator = _Validator(load_schema())
    errors = sorted(validator.iter_errors(config),
                    key=lambda e: (len(e.absolute_path), list(map(str, e.absolute_path))))
    if errors:
        err = errors[0]
        key = ".".join(str(p) for p in err.absolute_path) or "(top level)"
        if err.validator == "additionalProperties":
            extra = sorted(map(str, set(err.instance) - set(err.schema.get("properties", {}))))
            raise ConfigError(".".join(filter(None, [key if key != "(top level)" else "", extra[0] if extra else ""])),
                              "an unknown key", f"one of {sorted(err.schema.get('properties', {}))}")
        if err.validator == "required":
            raise ConfigError(key, err.message, "the required key to be present")
        raise ConfigError(key, f"{err.instance!r}", _expected(err))
    _check_consistency(config)
    return config


def _check_placeholders(value, key: str = ""):
    """Refuse a value still holding the :data:`PLACEHOLDER` of a starter config, naming its key."""
    if isinstance(value, dict):
        for name, item in value.items():
            _check_placeholders(item, f"{key}.{name}" if key else str(name))
    elif isinstance(value, list):
        for i, item in enumerate(value):
            _check_placeholders(item, f"{key}[{i}]")
    elif isinstance(value, str) and value.startswith(PLACEHOLDER):
        raise ConfigError(key, f"the placeholder {value!r} of a starter config",
                          "your own value in its place (edit the config file; for run.files the paths of your "
                          "HDF5 run files, or give them on the command line: movieproc process RUN.h5 --config FILE)")


def _expected(err) -> str:
    s = err.schema
    if err.validator == "type":
        if isinstance(err.instance, float) and not math.isfinite(err.instance):
            return f"a finite number (a value of type {s['type']})"
        return f"a value of type {s['type']}"
    if err.validator == "enum":
        return f"one of {s['enum']}"
    if err.validator in ("minimum", "exclusiveMinimum", "maximum", "exclusiveMaximum"):
        return f"a value with {err.validator} {s[err.validator]}"
    if err.validator in ("minItems", "maxItems"):
        return f"a list with {err.validator} {s[err.validator]}"
    return err.message


def _check_output_dir(value: str):
    """Refuse an output folder that would put the stores at the filesystem root or nowhere."""
    text = value.strip()
    if not text:
        raise ConfigError("output_dir", repr(value), "a folder for the outputs, e.g. results/run042 (not empty)")
    if Path(text).anchor and Path(text) == Path(Path(text).anchor):
        raise ConfigError("output_dir", repr(value), "a folder below the filesystem root, e.g. results/run042")


def _check_consistency(config: dict):
    _check_output_dir(config["output_dir"])
    b = config.get("binning", {})
    if b.get("mode") == "edges":
        edges = b.get("edges_ps")
        if not edges:
            raise ConfigError("binning.edges_ps", "no edges",
                              "a list of at least two increasing edges (ps) in edges mode")
        if any(e2 <= e1 for e1, e2 in zip(edges, edges[1:], strict=False)):
            raise ConfigError("binning.edges_ps", f"{edges}", "strictly increasing edges")
    model = config.get("model", {})
    if model.get("anomalous") and model.get("photon_energy_kev") is None:
        raise ConfigError("model.photon_energy_kev", "null with model.anomalous: true",
                          "the photon energy in keV at which f' and f'' are taken")
    lo, hi = config.get("differences", {}).get("norm_q_range", [0, 1])
    if hi <= lo:
        raise ConfigError("differences.norm_q_range", f"[{lo}, {hi}]", "[low, high] with low < high (1/Å)")


def merge(base: dict, layer: dict) -> dict:
    """Return ``base`` with the mapping ``layer`` merged in (sections merged key by key, values
    replaced). Values are taken as data: a path or name is never re-parsed."""
    out = copy.deepcopy(base)
    for key, value in layer.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def read_file(path) -> dict:
    """Read a YAML mapping from ``path``; every problem is a :class:`ConfigError` naming the file."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError("--config", f"no file {path}", "a YAML config file")
    try:
        raw = read_yaml(path.read_text(encoding="utf-8")) or {}
    except (yaml.YAMLError, UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise ConfigError(str(path), f"YAML that does not parse ({' '.join(str(exc).split())})",
                          "a YAML mapping") from None
    if not isinstance(raw, dict):
        raise ConfigError(str(path), f"a {type(raw).__name__}", "a YAML mapping at the top level")
    return raw


def build(path=None, overrides=None, layers=()) -> dict:
    """The raw config before validation: the file (default: the demo config), then each ``layers``
    mapping merged in as data, then the ``dotted.key=value`` overrides (parsed as YAML).

    In a config shipped with movieproc, ``demo_data/NAME`` names the shipped demo file, wherever
    movieproc runs; every other relative path (in a user's file, a layer or an override) stays
    relative to the working folder of the run."""
    path = Path(path) if path else resources.default_config()
    raw = read_file(path)
    if resources.is_shipped_config(path):
        raw = resources.resolve_demo_paths(raw)
    for layer in layers:
        raw = merge(raw, layer)
    raw = apply_overrides(raw, overrides)
    if not isinstance(raw.get("provenance"), dict):
        raw["provenance"] = {}
    raw["provenance"]["config_file"] = str(path)
    return raw


def load(path=None, overrides=None, layers=()) -> dict:
    """Read a config file (default: the demo config), merge ``layers``, apply overrides, validate."""
    return validate(build(path, overrides, layers))
