"""A self-contained HTML report of a movie: one file, figures embedded, no network, no scripts.

Built with the standard library (``html.escape`` and f-strings): run summary, selection
counts per reason, timing diagnostics, every figure, fitted parameters with errors and
correlations, warnings grouped by kind (details folded), the config and provenance, and
the safety notice.
"""

from __future__ import annotations

import base64
import html
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from ..io.store import atomic_path
from ..safety import SAFETY
from ..warning_groups import group_warnings
from . import style

__all__ = ["Content", "Figure", "render_html", "unit_text", "write"]

#: Selection counts that are totals, not reasons a shot was dropped.
TOTALS = ("total", "kept", "dropped", "kept_pump_on", "kept_pump_off", "outlier_pump_on", "outlier_pump_off")
#: An animation larger than this (bytes) is linked, not embedded.
MAX_EMBEDDED_GIF = 8_000_000

CSS = """
body{font-family:sans-serif;max-width:1100px;margin:1em auto;padding:0 1em;color:#222;line-height:1.4}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #ccc;margin-top:1.6em}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}td,th{border:1px solid #ccc;padding:2px 8px;
text-align:left}td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:1em 0}figure img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85em;color:#444}.safety{border:2px solid #b60;background:#fff6e8;padding:.5em 1em}
.warn{color:#a00}pre{background:#f6f6f6;padding:.5em;overflow-x:auto;font-size:.8em}
details{margin:.2em 0}summary{cursor:pointer}
"""


@dataclass
class Figure:
    """A figure for the report: its name, a caption, and its PNG bytes."""

    name: str
    caption: str
    png: bytes


@dataclass
class Content:
    """What the report shows.

    Attributes
    ----------
    name : str
        Run name.
    movie : movieproc.stages.render.Movie
        The movie as read for the figures.
    figures : list of Figure
    render_config : dict
    animation : str or None
        File name of the animation beside the report.
    shot_timing : bool
        Whether the timing diagnostics had per-shot data.
    """

    name: str
    movie: Any
    figures: list[Figure] = field(default_factory=list)
    render_config: dict = field(default_factory=dict)
    animation: str | None = None
    shot_timing: bool = False


def unit_text(units) -> str:
    """Units as printed after a value: '' for none or dimensionless ('1'), symbols for pint names."""
    return style.unit_label(units)


def _e(value) -> str:
    return html.escape(str(value))


def _table(rows, head=None) -> str:
    def cell(v, tag):
        num = isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)
        return f"<{tag}{' class=num' if num and tag == 'td' else ''}>{_e(v)}</{tag}>"

    out = ["<table>"]
    if head:
        out.append("<tr>" + "".join(cell(h, "th") for h in head) + "</tr>")
    out += ["<tr>" + "".join(cell(v, "td") for v in r) + "</tr>" for r in rows]
    return "\n".join(out + ["</table>"])


def _summary(c: Content) -> str:
    m, a = c.movie, c.movie.attrs
    n = np.asarray(m.n_shots)
    rows = [("movie", m.path), ("written", a.get("written", "?")),
            ("movieproc", (a.get("versions") or {}).get("movieproc", "?")),
            ("input files", ", ".join(map(str, a.get("input_files", [])))), ("detector data", a.get("input_mode", "?")),
            ("delay bins", f"{m.delay.size}, {np.nanmin(m.delay):.4g} to {np.nanmax(m.delay):.4g} ps"),
            ("q", f"{m.q.size} points, {m.q[0]:.3g} to {m.q[-1]:.3g} 1/Å"),
            ("pump-on shots per bin", f"{int(n.min())} to {int(n.max())} (median {int(np.median(n))})"),
            ("bins with too few shots", int(np.sum(m.low_count))),
            ("difference units", m.units or "not recorded")]
    if a.get("analysis_units"):
        rows.append(("analysis units", f"{a['analysis_units']} (difference × {a.get('absolute_scale_factor', 1):.4g})"))
    if "fit_reduced_chi2" in a:
        rows.append(("fit: reduced χ²", f"{float(a['fit_reduced_chi2']):.3f}"))
    out = _table(rows)
    if a.get("fit_converged") is False:
        out += "<p class=warn><b>The fit did NOT converge: its parameters are not reliable.</b></p>"
    return out


def _selection(a: dict) -> str:
    sc = a.get("selection_counts") or {}
    if not sc:
        return "<p>The movie records no selection counts.</p>"
    total = sc.get("total") or 0
    rows = [(k.replace("_", " "), v, f"{100 * v / total:.2f} %" if total else "") for k, v in sc.items()
            if k not in TOTALS]
    head = (f"<p>Kept {_e(sc.get('kept'))} of {_e(total)} shots ({_e(sc.get('kept_pump_on'))} pump-on, "
            f"{_e(sc.get('kept_pump_off'))} pump-off). A shot may be dropped for more than one reason.</p>")
    if "outlier_pump_on" in sc:
        head += f"<p>Outliers: {_e(sc['outlier_pump_on'])} pump-on, {_e(sc['outlier_pump_off'])} pump-off.</p>"
    return head + _table(rows, ("dropped because of", "shots", "of all shots"))


def _figure(f: Figure) -> str:
    data = base64.b64encode(f.png).decode("ascii")
    return (f'<figure id="fig-{_e(f.name)}"><img alt="{_e(f.name)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_e(f.caption)}</figcaption></figure>")


def _parameters(a: dict, corr) -> str:
    params = a.get("fit_parameters") or {}
    if not params:
        return "<p>No kinetic fit in this movie (fit.mode none, or no fit results).</p>"
    boot = any("bootstrap_error" in v for v in params.values())
    rows = [(k, f"{v['value']:.5g}", f"{v['error']:.2g}", unit_text(v.get("units")))
            + ((f"{v['bootstrap_error']:.2g}" if "bootstrap_error" in v else "",) if boot else ())
            for k, v in params.items()]
    head = ("parameter", "value", "± standard error", "units") + (("bootstrap error",) if boot else ())
    out = _table(rows, head)
    how = a.get("fit_errors")
    if isinstance(how, dict) and how.get("assumes"):
        out += f"<p><small>Errors: {_e(how.get('model', ''))}: {_e(how['assumes'])}</small></p>"
    names = a.get("fit_correlation_names") or []
    if corr is not None and len(names) == np.shape(corr)[0]:
        out += "<p>Correlations of the fitted parameters:</p>" + _table(
            [(n, *(f"{x:+.2f}" for x in row)) for n, row in zip(names, np.asarray(corr), strict=True)], ("", *names))
    return out


def _warnings(a: dict) -> str:
    warns = a.get("warnings") or []
    if not warns:
        return "<p>No warnings.</p>"
    groups = group_warnings(warns)
    out = [f"<p>{len(warns)} warning(s) of {len(groups)} kind(s); open a line for every message.</p>"]
    for g in groups:
        items = "".join(f"<li>{_e(msg)}</li>" for msg in g.messages)
        out.append(f"<details><summary><b>{g.count} ×</b> {_e(g.messages[0])}</summary><ul>{items}</ul></details>")
    return "\n".join(out)


def _config(c: Content) -> str:
    a = c.movie.attrs
    cfg = a.get("config") or {}
    prov = cfg.get("provenance") if isinstance(cfg, dict) else None
    parts = []
    if prov:
        parts.append("<h3>Provenance</h3><pre>" + _e(yaml.safe_dump(prov, sort_keys=False, allow_unicode=True))
                     + "</pre>")
    parts.append("<h3>Software and inputs</h3>" + _table(
        [(k, v) for k, v in (a.get("versions") or {}).items()]
        + [(f"checksum {Path(str(k)).name}", v) for k, v in (a.get("input_checksums") or {}).items()]))
    if a.get("conventions"):
        parts.append("<h3>Conventions</h3>" + _table(list((a.get("conventions") or {}).items())))
    parts.append("<details><summary>The movie's config (every section that shaped it)</summary><pre>"
                 + _e(yaml.safe_dump(cfg, sort_keys=False, allow_unicode=True)) + "</pre></details>")
    parts.append("<details><summary>Render settings of this report</summary><pre>"
                 + _e(yaml.safe_dump(c.render_config, sort_keys=False, allow_unicode=True)) + "</pre></details>")
    return "\n".join(parts)


def _animation(c: Content, folder: Path) -> str:
    if not c.animation:
        return "<p>No animation (render.animation is off).</p>"
    path = folder / c.animation
    if path.is_file() and path.stat().st_size <= MAX_EMBEDDED_GIF:
        data = base64.b64encode(path.read_bytes()).decode("ascii")
        return (f'<figure id="fig-animation"><img alt="animation" src="data:image/gif;base64,{data}">'
                "<figcaption>The difference curve (band ±1 standard error, line: fit) and the best-fitting "
                "structure at each delay.</figcaption></figure>")
    return f'<p>Animation: <a href="{_e(c.animation)}">{_e(c.animation)}</a></p>'


def render_html(c: Content, folder: Path) -> str:
    """The report as one HTML string (figures as base64 PNG; the animation from ``folder``)."""
    a = c.movie.attrs
    timing = [f for f in c.figures if f.name == "timing"]
    others = [f for f in c.figures if f.name != "timing"]
    missing = "" if c.shot_timing else (
        "<p><small>Per-shot timing (the delays and shots stores) was not available: the jitter histogram and the "
        "per-shot corrections are missing; the movie's per-bin timing is shown.</small></p>")
    sections = [
        ("summary", "Run summary", _summary(c)),
        ("selection", "Shot selection", _selection(a)),
        ("timing", "Timing diagnostics", missing + "".join(_figure(f) for f in timing)),
        ("figures", "Figures", "".join(_figure(f) for f in others)),
        ("fit", "Fitted parameters", _parameters(a, c.movie.arrays.get("correlation"))),
        ("animation", "Animation", _animation(c, folder)),
        ("warnings", "Warnings", _warnings(a)),
        ("config", "Config and provenance", _config(c)),
    ]
    toc = " · ".join(f'<a href="#{k}">{_e(t)}</a>' for k, t, _ in sections)
    body = "\n".join(f'<section id="{k}"><h2>{_e(t)}</h2>\n{s}\n</section>' for k, t, s in sections)
    safety = a.get("safety") or SAFETY
    return (f"<!DOCTYPE html>\n<html lang=en><head><meta charset=utf-8><title>{_e(c.name)}: movieproc report"
            f"</title>\n<style>{CSS}</style></head><body>\n<h1>{_e(c.name)}: movieproc report</h1>\n"
            f'<p class=safety><b>Note.</b> {_e(safety)}</p>\n<nav>{toc}</nav>\n{body}\n</body></html>\n')


def write(path, content: Content) -> Path:
    """Write the report to ``path`` atomically; returns the path."""
    path = Path(path)
    text = render_html(content, path.parent)
    with atomic_path(path) as tmp:
        Path(tmp).write_text(text, encoding="utf-8")
    return path
