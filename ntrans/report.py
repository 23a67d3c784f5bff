"""The handover report: one self-contained HTML file.

:func:`render_report` turns a plain dict of results and a dict of PNG images into HTML
with everything inside: images embedded as ``data:`` URIs, CSS inline, no scripts, no
links to anything outside the file.  Every value is passed through :func:`html.escape`.
The cautions of :mod:`ntrans.cautions` appear verbatim at the top and again at the end.

The context dict (all keys optional except ``classes``)::

    title, project           str
    move                     dict: source, target, closure, source_closure, composite,
                             elevation_rule, face_rule, window (text), window_mode
    units                    dict: horizontal, vertical, manning_k
    fit_domain               "faces" (default) or "cells": what the class fit, the stage
                             errors and the per-cell maps are over
    counts                   dict: cells, faces, classes; stages (stages per item in the
                             calibration window, a number or text); table_stages (text,
                             the stage tables' levels when they differ from the window)
    classes                  list of dicts, one per class (columns of n_by_class.csv)
    bias                     dict: before / after -> dict(median, p10, p90, mean_abs, weighted_median, weighted_mean_abs, count)
    inputs                   list of dicts: role, path, sha256
    notes                    list of str (warnings and remarks from the run)
    reference                str: the reference depth or stage of the friction-factor map
"""

from __future__ import annotations

import base64
import html
import math
import numbers
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from .cautions import CAUTIONS

#: (image key, heading, caption) in report order; missing images are skipped.  Headings
#: and captions are templates over the words of the fit domain (:data:`DOMAIN_WORDS`).
FIGURES: dict[str, tuple[tuple[str, str, str], ...]] = {
    "bias": (
        (
            "stage_bias_hist",
            "Spread over {items} and stages",
            "Stage in the target family minus stage in the source family at equal "
            "conveyance, per {item} and stage of the window: above with the source n carried "
            "over unchanged, below with the adjusted n per class.",
        ),
        (
            "stage_bias",
            "Where stages would be biased",
            "Per cell, the median {per_cell} stage error with n carried over unchanged. "
            "Positive: the target model would run high.",
        ),
    ),
    "maps": (
        (
            "friction_factor",
            "Where the terrain adds wetted bed",
            "Per cell, wetted bed area (3-D, from the terrain slope) over wet plan area at "
            "the reference depth. 1 means flat; higher values mean more bed for friction to "
            "act on.",
        ),
        (
            "n_ratio",
            "Change of n needed per cell",
            "Per cell, the median {per_cell} ratio of target to source n that keeps "
            "conveyance equal at equal stage, on a log scale centred "
            "on 1: orange where n must rise (the cells that would run low with n unchanged), "
            "purple where it must fall.",
        ),
    ),
    "plots": (
        (
            "class_ratios",
            "n ratio against depth per class",
            "Median (line) and 10-90 % band (shaded) across the {items} of each class.",
        ),
        (
            "cell_curves",
            "Representative cells",
            "Stage-volume and hydraulic-radius curves of the subgrid terrain against the "
            "flat bed, for the cells with the largest, median and smallest bed factor.",
        ),
    ),
}

CLASS_COLUMNS: tuple[tuple[str, str], ...] = (
    ("class", "class"),
    ("n_source", "n source"),
    ("n_target", "n target"),
    ("ratio", "ratio"),
    ("ratio_p10", "ratio 10 %"),
    ("ratio_p50", "ratio 50 %"),
    ("ratio_p90", "ratio 90 %"),
    ("faces", "{items}"),
    ("weight_share", "weight share"),
    ("bias_unadjusted_median", "stage error, n unchanged ({unit})"),
    ("bias_adjusted_median", "stage error, adjusted n ({unit})"),
    ("flags", "flags"),
)

#: the words of the report for each fit domain: the item the class fit used, and what a
#: per-cell map value is a median of
DOMAIN_WORDS: dict[str, dict[str, str]] = {
    "faces": {"item": "face", "items": "faces",
              "per_cell": "over the window and over its faces of the"},
    "cells": {"item": "cell", "items": "cells",
              "per_cell": "over the window of the cell's own"},
}


def domain_words(fit_domain: str | None) -> dict[str, str]:
    """The words of :data:`DOMAIN_WORDS` for ``fit_domain`` (faces when not given)."""
    return DOMAIN_WORDS.get(str(fit_domain or "faces"), DOMAIN_WORDS["faces"])


def _worded(text: str, words: Mapping[str, str]) -> str:
    """``text`` with its ``{item}``, ``{items}``, ``{per_cell}`` replaced by ``words``."""
    for key, value in words.items():
        text = text.replace("{" + key + "}", value)
    return text


CSS = """
body{font-family:-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:0;color:#1d2430;
background:#f6f7f9;line-height:1.5}
main{max-width:1000px;margin:0 auto;padding:1.5rem 2rem 3rem;background:#fff}
h1{font-size:1.7rem;margin:.2rem 0 .3rem}h2{font-size:1.3rem;margin-top:2.2rem;
border-bottom:2px solid #d8dde6;padding-bottom:.2rem}h3{font-size:1.05rem;margin-top:1.4rem}
.sub{color:#5b6575;margin-top:0}
.caution{border:3px solid #b35900;background:#fff4e5;padding:.8rem 1.2rem;margin:1.2rem 0;
border-radius:4px}.caution h2{border:none;margin:0 0 .4rem;font-size:1.15rem;color:#7a3d00}
.caution li{margin:.25rem 0;font-weight:600}
table{border-collapse:collapse;margin:.6rem 0;font-size:.9rem}
th,td{border:1px solid #d8dde6;padding:.25rem .55rem;text-align:right}
th{background:#eef1f5}td.l,th.l{text-align:left}
dl.kv{display:grid;grid-template-columns:max-content auto;gap:.2rem 1.2rem}
dl.kv dt{font-weight:600}dl.kv dd{margin:0}
figure{margin:1rem 0}figure img{max-width:100%;border:1px solid #d8dde6}
figcaption{font-size:.88rem;color:#4a5363}
code,.f{font-family:"DejaVu Sans Mono",Consolas,monospace;font-size:.9rem}
.f{display:block;background:#f3f5f8;padding:.35rem .7rem;margin:.3rem 0;border-radius:3px}
.flag{color:#8a4b00;font-weight:600}.muted{color:#6b7483}
"""


def esc(value: Any) -> str:
    """HTML-escaped text of any value (None -> empty)."""
    return "" if value is None else html.escape(str(value), quote=True)


def fmt(value: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant digits (NaN -> em dash), escaped."""
    if value is None:
        return "&mdash;"
    if isinstance(value, bool):
        return esc(value)
    if isinstance(value, numbers.Integral):
        return esc(int(value))
    try:
        number = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if not math.isfinite(number):
        return "&mdash;"
    return esc(f"{number:.{digits}g}")


def image_data_uri(image: str | os.PathLike[str] | bytes) -> str:
    """``data:image/png;base64,...`` for a PNG given as bytes or a path."""
    data = image if isinstance(image, bytes) else Path(image).read_bytes()
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _kv(pairs: Sequence[tuple[str, Any]]) -> str:
    rows = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in pairs if v not in (None, ""))
    return f'<dl class="kv">{rows}</dl>'


def _cautions_block(heading: str) -> str:
    items = "".join(f"<li>{esc(text)}</li>" for text in CAUTIONS)
    return f'<section class="caution"><h2>{esc(heading)}</h2><ul>{items}</ul></section>'


def _class_table(classes: Sequence[Mapping[str, Any]], unit: str = "m",
                 words: Mapping[str, str] | None = None) -> str:
    if not classes:
        return '<p class="muted">No roughness classes were fitted.</p>'
    words = words or domain_words(None)
    present = [(key, head) for key, head in CLASS_COLUMNS if any(key in row for row in classes)]
    head = "".join(
        f'<th class="{"l" if key in ("class", "flags") else ""}">'
        f'{esc(_worded(h, words).format(unit=unit))}</th>'
        for key, h in present
    )
    body = []
    for row in classes:
        cells = []
        for key, _ in present:
            value = row.get(key)
            if key == "class":
                cells.append(f'<td class="l">{esc(value)}</td>')
            elif key == "flags":
                text = "" if value is None or (isinstance(value, float) and math.isnan(value)) else value
                cells.append(f'<td class="l flag">{esc(text)}</td>')
            elif key == "weight_share":
                try:
                    share = f"{fmt(100 * float(value), 3)} %"
                except (TypeError, ValueError):
                    share = esc(value)
                cells.append(f"<td>{share}</td>")
            elif key == "faces":
                cells.append(f"<td>{fmt(value)}</td>")
            else:
                cells.append(f"<td>{fmt(value)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _flag_legend(classes: Sequence[Mapping[str, Any]]) -> str:
    """What the flags shown in the class table mean (only those that appear)."""
    from .translate import flags_explained

    rows = "".join(f"<dt><code>{esc(name)}</code></dt><dd>{esc(meaning)}</dd>"
                   for name, meaning in flags_explained(row.get("flags") for row in classes))
    return f'<dl class="kv flags">{rows}</dl>' if rows else ""


def _bias_table(bias: Mapping[str, Mapping[str, Any]], unit: str, item: str = "face") -> str:
    if not bias:
        return ""
    rows = []
    for key, label in (("before", "n carried over unchanged"), ("after", "adjusted n")):
        stats = bias.get(key)
        if not stats:
            continue
        rows.append(
            f'<tr><td class="l">{esc(label)}</td><td>{fmt(stats.get("median"), 3)}</td>'
            f'<td>{fmt(stats.get("p10"), 3)}</td><td>{fmt(stats.get("p90"), 3)}</td>'
            f'<td>{fmt(stats.get("mean_abs"), 3)}</td>'
            f'<td>{fmt(stats.get("weighted_median"), 3)}</td>'
            f'<td>{fmt(stats.get("weighted_mean_abs"), 3)}</td>'
            f'<td>{fmt(stats.get("count"))}</td></tr>'
        )
    head = (
        f'<tr><th class="l"></th><th>median ({esc(unit)})</th><th>10 % ({esc(unit)})</th>'
        f"<th>90 % ({esc(unit)})</th><th>mean |error| ({esc(unit)})</th>"
        f"<th>median, weighted by conveyance ({esc(unit)})</th>"
        f"<th>mean |error|, weighted by conveyance ({esc(unit)})</th><th>{esc(item)}-stages</th></tr>"
    )
    return f"<table><thead>{head}</thead><tbody>{''.join(rows)}</tbody></table>"


def _figures(group: str, images: Mapping[str, Any], words: Mapping[str, str]) -> str:
    parts = []
    for key, heading, caption in FIGURES[group]:
        if key not in images:
            continue
        heading, caption = _worded(heading, words), _worded(caption, words)
        parts.append(
            f"<h3>{esc(heading)}</h3><figure><img src=\"{image_data_uri(images[key])}\" "
            f'alt="{esc(heading)}"><figcaption>{esc(caption)}</figcaption></figure>'
        )
    return "".join(parts)


METHOD_HTML = """
<p>Each cell of a <b>subgrid-terrain</b> model keeps the terrain inside it; each cell of a
<b>flat-cell</b> model has a single bed elevation. The tool computes, from the same DEM and
the same mesh, the geometry both families see, and finds the n that gives the target family
the same conveyance as the source family at the same stage.</p>
<h3>Terrain inside a cell</h3>
<span class="f">surface factor s = &radic;(1 + (&part;z/&part;x)&sup2; + (&part;z/&part;y)&sup2;)
&nbsp;&nbsp;(3&times;3 gradient, Horn 1981)</span>
<span class="f">wet area A<sub>w</sub>(&eta;) = &Sigma; w a [z &lt; &eta;],&nbsp;
volume V(&eta;) = &Sigma; w a (&eta; &minus; z)<sup>+</sup>,&nbsp;
bed area A<sub>b</sub>(&eta;) = &Sigma; w a s [z &lt; &eta;]</span>
<span class="f">hydraulic radius R = V / A<sub>b</sub> (terrain),&nbsp; R = h (flat bed)</span>
<h3>Faces between cells</h3>
<p>Each face is sampled along its line at no more than half a pixel and treated as a
piecewise-linear station-elevation profile, which gives the flow area A, wetted perimeter P,
top width T and R = A / P exactly for that profile. Reference: channel geometric elements,
Chow (1959), <i>Open-Channel Hydraulics</i>, Table 2-1.</p>
<h3>Manning's equation and conveyance</h3>
<span class="f">Q = K S<sup>1/2</sup>,&nbsp; K = (k / n) A R<sup>2/3</sup>,&nbsp;
k = 1.0 (SI) or 1.486 (US customary) &mdash; Manning; Chow (1959)</span>
<p>A, R and depths enter K in the horizontal unit (elevations in another unit are converted
first), so face conveyance is in horizontal units cubed per second.</p>
<span class="f">flat face: K = (k / n) L h<sup>5/3</sup>;&nbsp; strips: K = k &Sigma; h<sub>j</sub><sup>5/3</sup>
&Delta;s<sub>j</sub> / n<sub>j</sub> (divided conveyance, Lotter)</span>
<h3>Composite n along a face</h3>
<span class="f">Horton&ndash;Einstein: n = (&Sigma; P<sub>i</sub> n<sub>i</sub><sup>3/2</sup> / P)<sup>2/3</sup></span>
<span class="f">Pavlovskii (Einstein&ndash;Banks): n = (&Sigma; P<sub>i</sub> n<sub>i</sub><sup>2</sup> / P)<sup>1/2</sup></span>
<span class="f">Lotter: n = P R<sup>5/3</sup> / &Sigma; (P<sub>i</sub> R<sub>i</sub><sup>5/3</sup> / n<sub>i</sub>)</span>
<p>Chow (1959) &sect;6-7; Einstein &amp; Banks (1950), <i>Trans. AGU</i> 31(4); Yen (2002),
<i>J. Hydraul. Eng.</i> 128(1).</p>
<h3>Carrying n across</h3>
<span class="f">n<sub>target</sub>(&eta;) = n<sub>source</sub> &middot; G<sub>target</sub>(&eta;) / G<sub>source</sub>(&eta;),
&nbsp; G = K &middot; n (conveyance with n factored out)</span>
<p>Equal conveyance at equal stage. Per class, one n is fitted by least squares in log
conveyance across the {items} and stages of the window, weighted by conveyance share; the
10, 50 and 90 % ratios show its spread. Per-cell shortcut at equal volume with a lumped
radius: n<sub>t</sub> = n<sub>s</sub> (A<sub>w</sub> / A<sub>b</sub>)<sup>2/3</sup>.
Cell conveyance form: Volp, van Prooijen &amp; Stelling (2013), <i>Water Resour. Res.</i> 49.</p>
<h3>Stage error</h3>
<p>For a {item} at source stage &eta;<sub>s</sub>, the target stage &eta;<sub>t</sub> solves
K<sub>target</sub>(&eta;<sub>t</sub>) = K<sub>source</sub>(&eta;<sub>s</sub>) (K rises with &eta;,
so a bracketed root search finds it). &eta;<sub>t</sub> &minus; &eta;<sub>s</sub> with n carried
over unchanged is the bias the adjustment removes; with the fitted n it should be near zero
where one n suits the class's {items} (a class flagged <code>wide_spread</code> keeps errors at
some of them).</p>
"""

LIMITATIONS = (
    "Conveyance is matched {item} by {item} at equal stage under uniform-flow friction; "
    "momentum, turbulence, form losses and lateral mixing are not represented.",
    "The result depends on the calibration window: outside the depths or stages given, "
    "the ratios can differ markedly, most of all near the stage at which a face first wets.",
    "The DEM is taken as the true bed. Features finer than a pixel (channels, levees, "
    "vegetation) and DEM errors pass straight into the wetted perimeter and bed area.",
    "Faces or cells wet in one family and dry in the other give no finite ratio and are "
    "left out of the class fit (see the flags).",
    "One n per class cannot remove the stage error everywhere; the spread shows how far "
    "individual {items} depart from the class value.",
)


def render_report(context: Mapping[str, Any], images: Mapping[str, Any]) -> str:
    """Render the report as one HTML string (images embedded, CSS inline, no scripts).

    Parameters
    ----------
    context
        Results as plain values (see the module docstring).
    images
        Image key -> PNG path or bytes; keys as in :data:`FIGURES`.
    """
    move = context.get("move", {})
    units = context.get("units", {})
    counts = context.get("counts", {})
    words = domain_words(context.get("fit_domain"))
    vertical = {"metre": "m", "foot": "ft", "us_survey_foot": "ft"}.get(
        str(units.get("vertical", "m")), str(units.get("vertical", "m"))
    )
    title = context.get("title") or "Manning's n carried between model families"
    source = move.get("source", "?")
    target = move.get("target", "?")
    closure = move.get("closure", "?")
    lead = (
        f"From {source} cells to {target} cells with the {closure} friction closure in the "
        f"target, over the calibration window {move.get('window', '?')}."
    )
    summary = _kv(
        [
            ("project", context.get("project")),
            ("source family", source),
            ("target family", target),
            ("target friction closure", closure),
            ("source friction closure", move.get("source_closure")),
            ("composite n along a face", move.get("composite")),
            ("flat cell bed elevation", move.get("elevation_rule")),
            ("flat face bed elevation", move.get("face_rule")),
            ("calibration window", move.get("window")),
            ("reference for the bed factor map", context.get("reference")),
            ("horizontal units", units.get("horizontal_name") or units.get("horizontal")),
            ("vertical units", units.get("vertical_name") or units.get("vertical")),
            ("Manning unit factor k", units.get("manning_k")),
            ("cells", counts.get("cells")),
            ("faces", counts.get("faces")),
            ("stages per face and cell in the window", counts.get("stages")),
            ("levels of the stage tables", counts.get("table_stages")),
        ]
    )
    notes = context.get("notes") or []
    notes_html = (
        "<h3>Remarks from the run</h3><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>"
        if notes
        else ""
    )
    inputs = context.get("inputs") or []
    inputs_html = ""
    if inputs:
        rows = "".join(
            f'<tr><td class="l">{esc(i.get("role"))}</td><td class="l"><code>{esc(i.get("path"))}</code></td>'
            f'<td class="l"><code>{esc(str(i.get("sha256", ""))[:16])}&hellip;</code></td></tr>'
            for i in inputs
        )
        inputs_html = (
            '<table><thead><tr><th class="l">input</th><th class="l">file</th>'
            f'<th class="l">SHA-256 (start)</th></tr></thead><tbody>{rows}</tbody></table>'
        )
    limitations = "".join(f"<li>{esc(_worded(t, words))}</li>" for t in LIMITATIONS)

    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(title)}</title><style>{CSS}</style></head><body><main>",
        f"<h1>{esc(title)}</h1>",
        f'<p class="sub">{esc(lead)}</p>',
        _cautions_block("Read this first"),
        "<h2>What was moved</h2>",
        summary,
        notes_html,
        "<h2>Manning's n per roughness class</h2>",
        "<p>n source is the calibrated value; n target the value that reproduces the source "
        "conveyance in the target family over the window; ratio = n target / n source, with its "
        f"10, 50 and 90 % across {words['items']} and stages. Weight share is the class's "
        "share of the fit's weights (its part of the conveyance where it is under water; 0 "
        "for a class not fitted). Stage errors are medians over the "
        f"class's {words['items']} and stages.</p>",
        _class_table(context.get("classes") or [], vertical, words),
        _flag_legend(context.get("classes") or []),
        "<h2>Stage error before and after</h2>",
        _bias_table(context.get("bias") or {}, vertical, words["item"]),
        _figures("bias", images, words),
        "<h2>Maps</h2>",
        "<p>GeoTIFF versions of these maps, on the DEM grid, are in the <code>maps</code> folder "
        "of this bundle; <code>maps/faces.gpkg</code> carries the same values per face.</p>",
        _figures("maps", images, words),
        "<h2>Figures</h2>",
        _figures("plots", images, words),
        "<h2>Method</h2>",
        _worded(METHOD_HTML, words),
        "<h2>Limitations</h2>",
        f"<ul>{limitations}</ul>",
        "<h2>Inputs and reproducibility</h2>",
        "<p>Every input, parameter, software version and output of this run, with SHA-256 "
        "checksums and the time of the run, is listed in <code>manifest.json</code>; "
        "<code>ntrans verify</code> checks the bundle against it.</p>",
        inputs_html,
        _cautions_block("Cautions"),
        "</main></body></html>",
    ]
    return "\n".join(p for p in parts if p) + "\n"


def write_report(
    path: str | os.PathLike[str], context: Mapping[str, Any], images: Mapping[str, Any]
) -> Path:
    """Render the report (:func:`render_report`) and write it as UTF-8."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(render_report(context, images), encoding="utf-8")
    return p
