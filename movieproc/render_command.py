"""``movieproc render MOVIE``: re-draw the figures and the report of an existing movie.

Nothing is re-run: the movie is only read. The render settings are those of the last
render into the output folder (recorded in its marker), else the defaults, changed with
``--set render.KEY=VALUE``; the figures go to ``--out`` (default: the ``figures``
folder beside the movie). Per-shot timing for the diagnostics is read from
``delays.zarr`` and ``shots.zarr`` beside the movie when they are there.
"""

from __future__ import annotations

from pathlib import Path

from . import config as mpconfig
from . import resources
from .errors import ConfigError, InputError


def add_parser(sub):
    """Register ``movieproc render``."""
    p = sub.add_parser("render", help="re-draw the figures and report.html of an existing movie (runs no stage)")
    p.add_argument("movie", help="movie store (movie.zarr)")
    p.add_argument("--out", "-o", help="folder for the figures and report (default: figures/ beside the movie)")
    p.add_argument("--set", dest="overrides", nargs="+", action="extend", default=[], metavar="KEY=VALUE",
                   help="render or run settings, e.g. --set render.formats=[png,pdf] render.animation=false")
    p.set_defaults(func=cmd_render)
    return p


def render_config(recorded: dict, overrides, earlier: dict | None = None) -> dict:
    """The ``render`` and ``run`` sections: the movie's recorded config with the ``render`` section of the
    earlier render in the output folder (``earlier``; else the schema's defaults), then ``overrides``.

    Only ``render.*`` and ``run.name`` may be overridden (the movie is not re-made).
    """
    recorded = recorded or {}
    for item in overrides:
        key = item.split("=", 1)[0]
        if not (key.startswith("render.") or key == "run.name"):
            raise ConfigError(key, "given to movieproc render", "a render.* key or run.name (the movie is only "
                              "re-drawn; other settings need movieproc run)")
    # validated inside a complete config (the default one), so that only these two settings matter
    raw = mpconfig.read_file(resources.default_config())
    raw["render"] = dict(earlier or recorded.get("render") or {})
    raw["run"]["name"] = (recorded.get("run") or {}).get("name", raw["run"]["name"])
    cfg = mpconfig.validate(mpconfig.apply_overrides(raw, overrides))
    return {"render": cfg["render"], "run": {"name": cfg["run"]["name"]}}


def cmd_render(args):
    from .io import movie as movie_io
    from .io import store
    from .stages import render

    movie = Path(args.movie)
    if not (movie / "zarr.json").is_file():
        raise InputError(movie, "not a zarr store", "a movie store (movie.zarr) written by movieproc run")
    recorded = movie_io.config(store.open_group(movie, "movie"))
    folder = Path(args.out) if args.out else movie.parent / "figures"
    cfg = render_config(recorded, args.overrides, render.earlier_settings(folder / ".done"))
    written = render.run({"movie": movie, "delays": movie.parent / "delays.zarr", "shots": movie.parent / "shots.zarr"},
                         folder / ".done", cfg)
    print(f"wrote {len(written)} file(s) in {folder}")
    print(f"report: {folder / render.REPORT}")
