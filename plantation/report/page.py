"""``report.html``: one self-contained page a reviewer can open offline and read from top to bottom.

:func:`build_report` reads whichever of ``assessment.json`` (accuracy
assessment and area estimates) and ``plots.json`` (the farm-plot check) a
folder holds, draws the map quicklooks from the mapped tiles when it finds
them, and writes ``report.html`` beside the inputs. Figures are PNGs drawn
with matplotlib (Agg) and embedded as data URIs; the CSS is inline; there is
no script at all, and a Content-Security-Policy forbids the page to load
anything from anywhere, so what a reviewer sees offline is all there is.

The JSON files are read by the modules that write them
(:func:`plantation.assessment.assess.read_assessment`,
:func:`plantation.farmplots.cutoff.read_plots_json`,
:func:`plantation.mapping.folder.read_manifest`); this page only presents
them. The page reads from the top: a summary (the area converted after the
cutoff with its interval, the plots by verdict with links to the evidence
pages of the flagged ones, what the map can and cannot say, which intervals
the report shows), then the maps, the areas and accuracy, the calibration,
the plots with their evidence pages (``evidence/evidence.json``,
:func:`plantation.farmplots.evidence.read_evidence`, used only when it was
drawn for the ``plots.json`` at hand), the imagery, provenance and cautions. A
sample-based interval the sample cannot support is marked, with a Wilson
interval beside it (:mod:`plantation.report.intervals`).

Every string that comes from a JSON file is escaped with :func:`html.escape`
before it reaches the page: an id like ``<script>`` stays text. A section
whose input is missing says so in one line instead of failing, so a report
can be written after the assessment and before the plot check, or the other
way round.
"""

from __future__ import annotations

import base64
import html
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from statistics import NormalDist
from typing import Any

import rasterio

from plantation import __version__
from plantation.assessment.assess import ASSESSMENT_NAME, read_assessment
from plantation.errors import FileFormatError, PlantationError
from plantation.farmplots.cutoff import PLOTS_JSON, read_plots_json
from plantation.farmplots.evidence import EVIDENCE_JSON, FOLDER, read_evidence
from plantation.mapping.folder import CORRECTION_TAG, MANIFEST, NOTICE, describe_correction, read_manifest, sha256_of
from plantation.mapping.styles import CLASS_STYLE
from plantation.reference.labels import LABEL_CODES
from plantation.report import figures
from plantation.report.intervals import PROBLEMS, wald_problem, wilson

REPORT_NAME = "report.html"

#: Reference/map class name → words a reader understands.
CLASS_LABELS: dict[str, str] = {name: CLASS_STYLE[code][0] for name, code in LABEL_CODES.items()} | {"no_data": "no data (too few clear dates)"}
#: Class name → legend colour (no data: white with a border).
CLASS_COLOURS: dict[str, str] = {name: CLASS_STYLE[code][1] for name, code in LABEL_CODES.items()} | {"no_data": "#ffffff"}

#: Verdict → (words, CSS class). "Low evidence" is deliberately neutral, not green: it is not a clearance.
VERDICTS: dict[str | None, tuple[str, str]] = {
    "strong_evidence": ("strong evidence", "v-strong"),
    "review": ("review", "v-review"),
    "low_evidence": ("low evidence", "v-low"),
    None: ("no verdict", "v-none"),
}

DASH = "—"

_CSS = """
:root { --ink: #1d232b; --muted: #5b6470; --rule: #d5d9de; --band: #f5f6f8; --warn: #8a4b12; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; color: var(--ink);
       margin: 0 auto; max-width: 1120px; padding: 24px 28px 64px; line-height: 1.45; font-size: 15px; background: #fff; }
h1 { font-size: 26px; margin: 0 0 4px; }
h2 { font-size: 20px; margin: 36px 0 8px; padding-top: 8px; border-top: 2px solid var(--ink); }
h3 { font-size: 16px; margin: 20px 0 6px; }
p { margin: 6px 0 10px; }
.muted, .caption { color: var(--muted); font-size: 13px; }
.caption { margin-top: 2px; }
.notice { border: 3px solid #b8322a; background: #fdf1ee; padding: 12px 16px; margin: 16px 0; font-size: 16px; font-weight: 600; }
.notice .small { font-weight: 400; font-size: 13px; margin-top: 6px; }
.banner-sim { border: 3px dashed #6b3fa0; background: #f4effb; color: #3c2266; padding: 12px 16px; margin: 16px 0; font-weight: 700; font-size: 16px; }
.notrun { border-left: 4px solid var(--rule); padding: 6px 12px; color: var(--muted); background: var(--band); }
dl.meta { display: grid; grid-template-columns: max-content 1fr; gap: 2px 16px; margin: 8px 0; font-size: 14px; }
dl.meta dt { color: var(--muted); }
dl.meta dd { margin: 0; }
nav ol { columns: 2; font-size: 14px; margin: 8px 0; }
nav a { color: var(--ink); }
table { border-collapse: collapse; margin: 8px 0 14px; font-size: 13.5px; }
th, td { border-bottom: 1px solid var(--rule); padding: 4px 8px; text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
td.num { white-space: nowrap; }
td.cls { white-space: nowrap; }
table.plots { font-size: 13px; }
table.plots code, table.plots .yr { white-space: nowrap; }
table.plots td.reasons { min-width: 240px; font-size: 12.5px; }
tr.total td { font-weight: 600; border-top: 2px solid var(--ink); }
tr.after td { background: #fdf5ec; }
tr.problem td { color: var(--muted); }
td .n { display: block; color: var(--muted); font-size: 11.5px; }
td.diag { background: #eef5f0; }
.swatch { display: inline-block; width: 11px; height: 11px; border: 1px solid #777; margin-right: 6px; vertical-align: -1px; }
.badge { display: inline-block; padding: 1px 8px; border-radius: 10px; font-size: 12.5px; font-weight: 600; white-space: nowrap; }
.v-strong { background: #b8322a; color: #fff; }
.v-review { background: #f2c14e; color: #3a2a00; }
.v-low { background: #dfe6ee; color: #27313d; }
.v-none { background: #fff; color: var(--muted); border: 1px solid var(--rule); }
figure { margin: 10px 0 18px; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
.figrow { display: flex; flex-wrap: wrap; gap: 16px; }
.figrow figure { flex: 1 1 420px; }
code, .hash { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: 12.5px; overflow-wrap: anywhere; }
details pre { background: var(--band); padding: 10px; overflow-x: auto; font-size: 12.5px; max-height: 480px; }
ul.cautions li { margin-bottom: 6px; }
.ok { color: #23663f; } .bad { color: #b8322a; font-weight: 600; }
.wide { overflow-x: auto; }
.flag { color: #b8322a; font-weight: 700; }
td .alt { display: block; color: #23663f; font-size: 11.5px; }
.footnote { font-size: 12.5px; color: var(--muted); border-top: 1px solid var(--rule); padding-top: 4px; }
#summary { border: 2px solid var(--ink); padding: 10px 16px 6px; margin: 12px 0 10px; background: #fbfbfc; }
#summary h2 { border: 0; margin: 0 0 6px; padding: 0; }
.headline { font-size: 19px; margin: 4px 0 8px; }
.headline b { font-size: 22px; }
ul.flagged { columns: 3; font-size: 13.5px; margin: 4px 0 8px; padding-left: 18px; }
ul.counts { list-style: none; padding: 0; margin: 6px 0; display: flex; flex-wrap: wrap; gap: 6px 18px; }
.meta-line { color: var(--muted); font-size: 13px; margin: 2px 0 6px; }
details.evidence { border: 1px solid var(--rule); margin: 6px 0; padding: 4px 10px; }
details.evidence summary { cursor: pointer; font-size: 14px; }
details.evidence img { margin-top: 6px; }
table.clear td { text-align: right; font-variant-numeric: tabular-nums; min-width: 46px; }
@media print { body { max-width: none; padding: 0; } h2 { break-before: auto; } table, figure { break-inside: avoid; } }
"""

# The page may load nothing: images are data URIs, the style is inline, and there is no script.
_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; form-action 'none'"


# --------------------------------------------------------------------------- formatting


def esc(value: Any) -> str:
    """HTML-escaped text of any value (quotes too, so it is safe in attributes)."""
    return html.escape("" if value is None else str(value), quote=True)


def _finite(x: Any) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def num(x: Any, digits: int = 3) -> str:
    """A number with thousands separators and ``digits`` decimals; a dash for null or non-finite."""
    return f"{x:,.{digits}f}" if _finite(x) else DASH


def pct(x: Any, digits: int = 1) -> str:
    """A share (0–1) as a percentage; a dash for null."""
    return f"{100 * x:.{digits}f}%" if _finite(x) else DASH


def interval(lo: Any, hi: Any, digits: int = 3) -> str:
    """``lo–hi`` with an en dash, as every interval in the report is written."""
    if not (_finite(lo) or _finite(hi)):
        return DASH
    return f"{num(lo, digits)}–{num(hi, digits)}"


def _class_label(name: str) -> str:
    swatch = f'<span class="swatch" style="background:{CLASS_COLOURS[name]}"></span>' if name in CLASS_COLOURS else ""
    return swatch + esc(CLASS_LABELS.get(name, name.replace("_", " ")))


def _short_path(p: Any, keep: int = 1) -> str:
    """A path as the report shows it: an absolute path loses its machine-specific prefix and keeps its last ``keep`` parts."""
    if not p:
        return DASH
    path = Path(str(p))
    if path.is_absolute() or str(p).startswith("~"):
        return "…/" + "/".join(path.parts[-keep:])
    return str(p)


def _rows(rows: Iterable[Sequence[str]], cls: Sequence[str] = ()) -> str:
    out = []
    for r in rows:
        cells = "".join(f'<td class="{cls[i]}">{c}</td>' if i < len(cls) and cls[i] else f"<td>{c}</td>" for i, c in enumerate(r))
        out.append(f"<tr>{cells}</tr>")
    return "".join(out)


def _img(png: bytes, alt: str) -> str:
    return f'<img src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}" alt="{esc(alt)}">'


def _notrun(text: str) -> str:
    return f'<p class="notrun">{esc(text)}</p>'


# --------------------------------------------------------------------------- inputs


def _locate(value: Any, folder: Path) -> Path | None:
    """A file or folder named in a JSON file: as given if absolute, else beside the JSON or under the working directory."""
    if not value:
        return None
    p = Path(str(value)).expanduser()
    for cand in [p] if p.is_absolute() else [folder / p, Path.cwd() / p]:
        if cand.exists():
            return cand
    return None


def _check(path: Path | None, expected: Any) -> str:
    """Whether the file at hand still has the recorded sha256 (empty when it cannot be checked)."""
    if path is None or not path.is_file() or not expected:
        return ""
    if sha256_of(path) == str(expected):
        return ' <span class="ok">✓ matches the file at hand</span>'
    return ' <span class="bad">✗ differs from the file at hand: it changed after this record was made</span>'


def _day(value: Any) -> str:
    return esc(str(value)[:19].replace("T", " ")) if value else DASH


# --------------------------------------------------------------------------- sections


def _header(region: str, dates: list[tuple[str, str]], simulated: bool) -> str:
    """Title, the dates of the inputs on one line, and the demonstration banner: all above the summary."""
    items = " · ".join(f"{esc(k)} {v}" for k, v in dates)
    sim = ""
    if simulated:
        sim = (
            '<div class="banner-sim" id="simulated-banner">Demonstration only: the reference labels of this assessment were filled from simulated truth, '
            "not interpreted by people. Its accuracies and areas show how the method works; they say nothing about a real landscape.</div>"
        )
    return f'<header><h1>Conversion of natural forest to tree-crop plantation: {esc(region)}</h1><p class="meta-line">{items}</p>{sim}</header>'


def _notice_and_contents(assessed: bool) -> str:
    areas = (
        '<div class="small">Areas below are estimated from a reference sample with confidence intervals; the map\'s own pixel counts are shown only beside them for comparison.</div>'
        if assessed
        else ""
    )
    toc = "".join(
        f'<li><a href="#{a}">{t}</a></li>'
        for a, t in (
            ("maps", "Map quicklooks"),
            ("areas", "Converted area by year"),
            ("accuracy", "Accuracy and area estimates"),
            ("calibration", "Calibration on held-out data"),
            ("plots", "Farm plots and their evidence pages"),
            ("imagery", "Imagery"),
            ("provenance", "Provenance"),
            ("cautions", "Cautions"),
        )
    )
    return f'<div class="notice" role="note">{esc(NOTICE)}{areas}</div><nav><ol>{toc}</ol></nav>'


#: The summary lists at most this many flagged plots by name; the plot table has them all.
SUMMARY_PLOTS = 30
#: Evidence pages embedded in the report, most attention first; the others are linked as files beside it.
MAX_EMBEDDED = 300


def _attention(r: Mapping[str, Any]) -> tuple[int, float, str]:
    order = {"strong_evidence": 0, "review": 1, "low_evidence": 2}
    e = r.get("expected_after_ha")
    return (order.get(str(r.get("verdict")), 3), -(e if _finite(e) else -1.0), str(r.get("id") or ""))


def _anchor(page: Mapping[str, Any]) -> str:
    """The evidence page's anchor in the report (its file name is already plain)."""
    return "ev-" + str(page.get("file", "")).rsplit(".", 1)[0]


def _intervals_note(a: dict[str, Any] | None, p: dict[str, Any] | None, map_level: float | None) -> str:
    """Which intervals the report shows, each with its level and kind, and why the levels differ."""
    kinds = []
    if a is not None:
        kinds.append(f"{float(a.get('confidence') or 0.95):.0%} confidence intervals of the stratified estimator (areas and accuracies, from the reference sample)")
    kinds.append(f"{map_level:.0%} credible intervals of the onset year (each pixel, from the model's calibrated distribution)" if map_level else "credible intervals of the onset year (each pixel)")
    if p is not None and _finite(p.get("interval_level")):
        kinds.append(f"{p['interval_level']:.0%} ranges of a plot's area converted after the cutoff (under the map's model, not a sampling interval)")
    if a is not None and a.get("validation"):
        kinds.append("nominal levels of 50% to 95% in the coverage check of the onset intervals")
    return (
        '<p class="muted"><b>Intervals in this report:</b> '
        + esc("; ".join(kinds))
        + ". Why the levels differ: 95% is the convention for reporting sample estimates; the onset interval is kept at a lower level so that it can pin a year "
        "where the imagery allows (at 95% most would span several years); the plot range's level is the plot check's setting; the coverage check tries several levels to test whether each holds.</p>"
    )


def _summary_section(a: dict[str, Any] | None, p: dict[str, Any] | None, pages: Mapping[str, Mapping[str, Any]], map_level: float | None) -> str:
    """The first screen: how much was converted after the cutoff, which plots to look at, and what the map can and cannot say."""
    out = ['<section id="summary"><h2>Summary</h2>']
    after = (a or {}).get("after_cutoff") or {}
    cut = after.get("cutoff_year") if after else ((p or {}).get("cutoff") or {}).get("year")
    cut_date = ((p or {}).get("cutoff") or {}).get("date") or (f"{cut}-12-31" if cut is not None else None)
    if a is not None and after and _finite(after.get("estimate")):
        flags = _flags(a)
        n = _sample_n(a)
        out.append(
            f'<p class="headline">Converted to tree-crop plantation after {esc(cut_date or cut)}: <b>{num(after.get("estimate"), 1)} ha</b> '
            f"({flags.confidence:.0%} confidence interval, stratified estimator: {flags.interval(after, 1, area=True, points=n)} ha), "
            f"estimated from a reference sample of {esc(n if n is not None else DASH)} points. The map's own pixel count is {num(after.get('mapped_ha'), 1)} ha.</p>"
        )
        out.append(flags.footnote())
    elif a is not None:
        out.append(_notrun("The assessment holds no estimate of the area converted after the cutoff."))
    else:
        out.append(_notrun("No accuracy assessment yet: there is no sample-based estimate of the area converted after the cutoff (run `plantation assess`)."))
    if p is not None:
        plots = [r for r in p.get("plots") or [] if isinstance(r, Mapping)]
        counts = {k: sum(1 for r in plots if r.get("verdict") == k) for k in ("strong_evidence", "review", "low_evidence")}
        unmeasured = sum(1 for r in plots if r.get("status") not in (None, "ok"))
        items = "".join(f'<li><span class="badge {VERDICTS[k][1]}">{esc(VERDICTS[k][0])}</span> {counts[k]} plot{"s" if counts[k] != 1 else ""}</li>' for k in counts)
        if unmeasured:
            items += f'<li><span class="badge v-none">not measured</span> {unmeasured}</li>'
        out.append(f'<p><b>{len(plots)} farm plots checked against the cutoff</b> (conversion after {esc(cut_date or DASH)}):</p><ul class="counts">{items}</ul>')
        flagged = sorted((r for r in plots if r.get("verdict") in ("strong_evidence", "review")), key=_attention)
        if flagged:
            lis = []
            for r in flagged[:SUMMARY_PLOTS]:
                pid = str(r.get("id"))
                words, css = VERDICTS.get(r.get("verdict"), (str(r.get("verdict")), "v-none"))
                page = pages.get(pid)
                name = f'<a href="#{esc(_anchor(page))}"><code>{esc(pid)}</code></a>' if page else f"<code>{esc(pid)}</code>"
                lis.append(f'<li>{name} <span class="badge {css}">{esc(words)}</span> {num(r.get("expected_after_ha"), 2)} ha</li>')
            more = f" and {len(flagged) - SUMMARY_PLOTS} more in the plot table" if len(flagged) > SUMMARY_PLOTS else ""
            link = " (each name opens its evidence page)" if pages else ""
            out.append(f'<p><b>Plots to look at first</b>{esc(link)}, with the area the map expects converted after the cutoff{esc(more)}:</p><ul class="flagged">{"".join(lis)}</ul>')
        else:
            out.append("<p>No plot has strong evidence or calls for review.</p>")
    else:
        out.append(_notrun("Plot check not run: no plots.json in this folder."))
    can = [
        "The map says where, and in which year, the imagery shows natural forest giving way to tree-crop plantation, with a probability for each pixel; "
        "the areas to quote are the sample-based estimates, which carry the map's errors in their intervals."
    ]
    prod = ((a or {}).get("producers") or {}).get("conversion")
    user = ((a or {}).get("users") or {}).get("conversion")
    if isinstance(prod, Mapping) and isinstance(user, Mapping) and _finite(prod.get("estimate")) and _finite(user.get("estimate")):
        can.append(f"Against the reference sample it finds about {pct(prod['estimate'], 0)} of the converted area, and {pct(user['estimate'], 0)} of what it maps as converted is conversion.")
    t = (a or {}).get("timing") or {}
    ex, w1 = (t.get("exact") or {}).get("estimate"), (t.get("within1") or {}).get("estimate")
    if _finite(ex) and _finite(w1):
        can.append(f"It resolves years, not dates: the onset year is exact for about {pct(ex, 0)} of sampled conversions and within one year for {pct(w1, 0)}.")
    else:
        can.append("It resolves years, not dates: a conversion in the cutoff's own year may lie on either side of it.")
    can.append(
        "It cannot see a clearing the imagery never showed clear (clouds, the last months of the series), and it can take logging, fire or cropland for conversion: "
        "a verdict is evidence for a look with high-resolution imagery and in the field, not a finding."
    )
    out.append("<p><b>What the map can and cannot say.</b> " + esc(" ".join(can)) + "</p>")
    out.append(_intervals_note(a, p, map_level))
    return "".join(out) + "</section>"


def _map_section(map_dir: Path | None, years_hint: Sequence[int], cutoff_hint: int | None) -> tuple[str, str | None]:
    """The quicklooks section, and the region named in the tiles' tags (if any)."""
    head = '<section id="maps"><h2>1. Map quicklooks</h2>'
    if map_dir is None:
        return head + _notrun("Map quicklooks not drawn: no map folder was given or found.") + "</section>", None
    cogs = sorted(p for p in map_dir.glob("*.tif") if not p.name.startswith("."))
    if not cogs:
        return head + _notrun("Map quicklooks not drawn: the map folder holds no mapped tiles (<tile>.tif).") + "</section>", None
    try:
        m = figures.read_mosaic(cogs)
    except PlantationError as exc:
        return head + _notrun(f"Map quicklooks not drawn: {exc}") + "</section>", None
    with rasterio.open(map_dir / f"{m.tiles[0]}.tif") as src:
        region = src.tags().get("model_region")
    conv = m.converted
    onset = m.layers["onset_year"].filled(0)[conv]
    years = set(int(y) for y in years_hint)
    if onset.size:
        years |= {int(onset.min()), int(onset.max())}
    cutoff = m.cutoff_years[0] if len(m.cutoff_years) == 1 else cutoff_hint
    if not years:
        years = {cutoff or 0}
    yr = list(range(min(years), max(years) + 1))
    level = m.interval_levels[0] if len(m.interval_levels) == 1 else None
    scale = f"{m.pixel_size:.5f}°" if m.geographic else f"{m.pixel_size:,.0f} m"
    decim = "every map pixel is shown" if m.factor <= 1.0001 else f"about one map pixel in {m.factor:.0f} along each side is shown (read through the tiles' overviews)"
    notes = [f"{len(m.tiles)} tile{'s' if len(m.tiles) != 1 else ''} ({esc(', '.join(m.tiles))}) mosaicked in {esc(m.crs)}, {esc(scale)} per figure pixel: {esc(decim)}."]
    if len(m.cutoff_years) > 1:
        notes.append(f"The tiles were mapped with different cutoff years ({esc(', '.join(map(str, m.cutoff_years)))}); the colour bar marks {esc(cutoff)}.")
    if len(m.interval_levels) > 1:
        notes.append(f"The tiles were mapped with different interval levels ({esc(', '.join(map(str, m.interval_levels)))}).")
    if m.skipped:
        notes.append("Left out: " + esc("; ".join(m.skipped)) + ".")
    lvl = f"{level:.0%}" if level else "credible"
    body = (
        f'<p class="muted">{" ".join(notes)}</p>'
        f"<figure>{_img(figures.onset_overview(m, years=yr, cutoff_year=cutoff), 'Onset-year map')}"
        '<figcaption class="caption">Onset year: the most probable year each pixel was converted to tree-crop plantation, on a colour ramp from early (violet) to recent (orange). '
        + (f"The black line in the colour bar is the cutoff: years to its right are after {esc(cutoff)}. " if cutoff is not None else "")
        + "Pixels not mapped as converted are drawn in pale tones by their mapped class.</figcaption></figure>"
        f"<figure>{_img(figures.uncertainty_overview(m, interval_level=level), 'Uncertainty maps')}"
        f'<figcaption class="caption">Uncertainty, three ways. First: how many years the {esc(lvl)} interval of the onset year spans, on converted pixels '
        "(green: the year is pinned to one year; red: the imagery leaves several years open). "
        "Second: p_conversion, the calibrated probability that the pixel was converted in any year of the series; it says how strongly the imagery points to a conversion, not that one happened. "
        "Third: epistemic uncertainty, the disagreement between the ensemble's members (mutual information, nats, as the distilled network estimates it "
        "unless the map was made with every member; the scale stops at the 99th percentile); "
        "where it is high the model has seen little like the pixel in training, and its probabilities deserve less trust.</figcaption></figure>"
    )
    return head + body + _fire_note(map_dir) + "</section>", region


def _fire_note(map_dir: Path) -> str:
    """Fire in the clearing, from the manifest's per-tile fire areas (map pixel counts); empty for a map made before the fire layers."""
    try:
        manifest = read_manifest(map_dir)
    except PlantationError:
        return ""
    tiles = list((manifest or {}).get("tiles", {}).values())
    if not tiles or not all(isinstance(t.get("fire_ha"), dict) and t["fire_ha"] for t in tiles):
        return ""

    def ha(key: str) -> float:
        return sum(float(t["fire_ha"].get(key, 0.0)) for t in tiles)

    burnt, bare, unknown, escaped = ha("converted_burnt"), ha("converted_not_burnt"), ha("converted_unknown"), ha("escaped_fire")
    after = sum(float(t.get("fire_after_cutoff_ha", 0.0)) for t in tiles)
    return (
        '<p id="fire-areas">Fire in the clearing (map pixel counts, not area estimates): '
        f"{num(burnt, 1)} ha mapped as converted were cleared with fire ({num(after, 1)} ha of it after the cutoff year), "
        f"{num(bare, 1)} ha without fire, and for {num(unknown, 1)} ha it is unknown: no clear view followed the clearing closely enough to tell, which is not evidence of no fire. "
        f"{num(escaped, 1)} ha of forest beside clearings burnt in their season and grew back (fire escaped from the clearing; not converted). "
        "Fire is read from the drop in NBR (dNBR, Key &amp; Benson 2006) and from char at the first clear view after the clearing (BAI, Chuvieco et al. 2002, and the change in SWIR1); "
        "the map's fire, fire_year and dnbr layers hold it pixel by pixel.</p>"
    )


class Flags:
    """Degenerate Wald intervals met while writing a section, for its footnote (:func:`_footnote`)."""

    def __init__(self, z: float, confidence: float, total_ha: float | None) -> None:
        self.z = z
        self.confidence = confidence
        self.total_ha = total_ha
        self.seen: set[str] = set()
        self.bases: set[str] = set()

    def cells(self, d: Mapping[str, Any] | None, digits: int = 3, *, area: bool = False, points: int | None = None) -> list[str]:
        """Estimate, SE and interval cells; an interval the sample cannot support is marked †, with the Wilson interval beneath it."""
        if not d or not _finite(d.get("estimate")):
            return [DASH, DASH, DASH]
        return [num(d["estimate"], digits), num(d.get("se"), digits), self.interval(d, digits, area=area, points=points)]

    def interval(self, d: Mapping[str, Any], digits: int = 3, *, area: bool = False, points: int | None = None) -> str:
        text = interval(d.get("lo"), d.get("hi"), digits)
        est, lo, hi, se = d.get("estimate"), d.get("lo"), d.get("hi"), d.get("se")
        if not all(_finite(x) for x in (est, lo, hi)):
            return text
        problem = wald_problem(float(est), float(lo), float(hi), proportion=not area)
        if problem is None:
            return text
        self.seen.add(problem)
        scale = 1.0
        if area:
            if not self.total_ha or self.total_ha <= 0:
                return f'{text} <span class="flag" title="{esc(PROBLEMS[problem])}">†</span>'
            scale = float(self.total_ha)
        w = wilson(float(est) / scale, float(se) / scale if _finite(se) else None, self.z, points)
        alt = ""
        if w is not None:
            self.bases.add(w.basis)
            alt = f'<span class="alt">Wilson {interval(w.lo * scale, w.hi * scale, digits)}</span>'
        return f'{text} <span class="flag" title="{esc(PROBLEMS[problem])}">†</span>{alt}'

    def footnote(self) -> str:
        """The footnote on the flagged intervals of a section (empty if none)."""
        if not self.seen:
            return ""
        why = "; ".join(PROBLEMS[k] for k in PROBLEMS if k in self.seen)
        basis = []
        if "effective" in self.bases:
            basis.append("n is the effective sample size p(1 − p)/SE², the number of simple random points that would give the estimate's standard error (Kish 1965; Korn & Graubard 1998)")
        if "points" in self.bases:
            basis.append("where p is 0 or 1 (SE 0), n is the number of sample points behind the estimate")
        return (
            f'<p class="footnote"><span class="flag">†</span> The {self.confidence:.0%} Wald interval (estimate ± {self.z:.2f} SE) cannot be supported by the sample here: {esc(why)}. '
            "Wald intervals fail for proportions near 0 or 1 and for few points (Agresti &amp; Coull 1998). "
            f"Beneath it, in green, the {self.confidence:.0%} Wilson score interval (Wilson 1927), which stays within 0–1 and is not empty at 0 or 1"
            + (f"; {'; '.join(basis)}" if basis else "")
            + ". Areas are treated as their share of the region's area. Quote the Wilson interval for these cells.</p>"
        )


def _flags(a: Mapping[str, Any]) -> Flags:
    conf = float(a.get("confidence") or 0.95)
    z = a.get("z") if _finite(a.get("z")) else NormalDist().inv_cdf(0.5 + conf / 2)
    total = a.get("total_area_ha")
    if not _finite(total):
        total = sum(float(s.get("area_ha") or 0.0) for s in a.get("strata") or [] if _finite(s.get("area_ha"))) or None
    return Flags(float(z), conf, total)


def _sample_n(a: Mapping[str, Any]) -> int | None:
    n = (a.get("sample") or {}).get("n")
    return int(n) if _finite(n) else None


def _areas_section(a: dict[str, Any] | None) -> str:
    head = '<section id="areas"><h2>2. Converted area by onset year</h2>'
    if a is None:
        return head + _notrun("Accuracy assessment not run: no assessment.json, so there are no sample-based area estimates.") + "</section>"
    rows = a.get("conversion_by_year") or []
    conf = float(a.get("confidence") or 0.95)
    after = a.get("after_cutoff") or {}
    cutoff = after.get("cutoff_year")
    if not rows:
        return head + _notrun("The assessment holds no estimates by onset year.") + "</section>"
    fig = figures.area_by_year_bars(rows, cutoff_year=cutoff, confidence=conf)
    flags = _flags(a)
    n = _sample_n(a)
    tr = []
    for r in rows:
        late = cutoff is not None and r.get("year") is not None and int(r["year"]) > int(cutoff)
        cells = [esc(r.get("year")), num(r.get("mapped_ha"), 1), *flags.cells(r, 1, area=True, points=n)]
        tr.append(f'<tr class="{"after" if late else ""}">' + "".join(f'<td class="num">{c}</td>' for c in cells) + "</tr>")
    if after:
        cells = [f"after {esc(cutoff)}", num(after.get("mapped_ha"), 1), *flags.cells(after, 1, area=True, points=n)]
        tr.append('<tr class="total">' + "".join(f'<td class="num">{c}</td>' for c in cells) + "</tr>")
    conv = (a.get("area_ha") or {}).get("conversion")
    total = ""
    if conv:
        total = (
            f"<p>All years together: the map counts {num(conv.get('mapped_ha'), 1)} ha as converted; the sample-based estimate is {num(conv.get('estimate'), 1)} ha "
            f"({conf:.0%} confidence interval, stratified estimator: {flags.interval(conv, 1, area=True, points=n)} ha).</p>"
        )
    return (
        head + f"<figure>{_img(fig, 'Converted area by onset year')}"
        '<figcaption class="caption">Hatched grey: the map (pixel count), the area of pixels mapped as converted in each year. '
        f"Red: the sample-based estimate, with its {conf:.0%} confidence interval. "
        "The pixel count carries every error of the map; the estimate corrects for them with the reference sample, and it is the estimate that should be quoted.</figcaption></figure>"
        + total
        + f'<table><thead><tr><th class="num">onset year</th><th class="num">map (pixel count), ha</th><th class="num">sample-based estimate, ha</th><th class="num">SE, ha</th>'
        f'<th class="num">{conf:.0%} confidence interval (stratified estimator), ha</th></tr></thead><tbody>{"".join(tr)}</tbody></table>' + flags.footnote() + "</section>"
    )


def _matrix(a: dict[str, Any]) -> str:
    ref = list(a.get("classes") or [])
    mapc = list(a.get("map_classes") or ref)
    em = a.get("error_matrix") or {}
    props = em.get("proportions") or []
    counts = em.get("counts") or []

    def cell(tab: list, i: int, j: int) -> Any:
        try:
            return tab[i][j]
        except (IndexError, TypeError):
            return None

    head = "".join(f"<th>{_class_label(c)}</th>" for c in ref)
    body = []
    for i, mc in enumerate(mapc):
        tds = []
        for j, rc in enumerate(ref):
            p, n = cell(props, i, j), cell(counts, i, j)
            diag = ' class="num diag"' if mc == rc else ' class="num"'
            tds.append(f'<td{diag}>{num(p, 4)}<span class="n">n = {esc(n if n is not None else DASH)}</span></td>')
        rp = sum(x for x in (cell(props, i, j) for j in range(len(ref))) if _finite(x))
        rn = sum(x for x in (cell(counts, i, j) for j in range(len(ref))) if _finite(x))
        tds.append(f'<td class="num"><b>{num(rp, 4)}</b><span class="n">n = {rn}</span></td>')
        body.append(f"<tr><th>{_class_label(mc)}</th>{''.join(tds)}</tr>")
    tot = []
    for j in range(len(ref)):
        cp = sum(x for x in (cell(props, i, j) for i in range(len(mapc))) if _finite(x))
        cn = sum(x for x in (cell(counts, i, j) for i in range(len(mapc))) if _finite(x))
        tot.append(f'<td class="num">{num(cp, 4)}<span class="n">n = {cn}</span></td>')
    allp = sum(x for row in props for x in (row or []) if _finite(x))
    alln = sum(x for row in counts for x in (row or []) if _finite(x))
    tot.append(f'<td class="num">{num(allp, 4)}<span class="n">n = {alln}</span></td>')
    body.append(f'<tr class="total"><th>total (reference)</th>{"".join(tot)}</tr>')
    return (
        '<h3>Error matrix in estimated area proportions</h3><div class="wide"><table>'
        f'<thead><tr><th>map class ↓ / reference class →</th>{head}<th class="num">total (map)</th></tr></thead><tbody>{"".join(body)}</tbody></table></div>'
        "<p class=\"caption\">Each cell is the estimated share of the region's area that the map puts in the row's class and the reference puts in the column's; "
        "beneath it, the number of sample points in that cell. The diagonal (shaded) is where map and reference agree.</p>"
    )


def _accuracy_section(a: dict[str, Any] | None) -> str:
    head = '<section id="accuracy"><h2>3. Accuracy and area estimates</h2>'
    if a is None:
        return head + _notrun("Accuracy assessment not run: no assessment.json in this folder.") + "</section>"
    conf = float(a.get("confidence") or 0.95)
    ci = f"{conf:.0%} confidence interval"
    sample = a.get("sample") or {}
    flags = _flags(a)
    n_all = _sample_n(a)
    ref = list(a.get("classes") or [])
    mapc = list(a.get("map_classes") or ref)
    counts = (a.get("error_matrix") or {}).get("counts") or []

    def row_n(c: str) -> int | None:
        try:
            return int(sum(counts[mapc.index(c)]))
        except (ValueError, IndexError, TypeError):
            return None

    def col_n(c: str) -> int | None:
        try:
            j = ref.index(c)
            return int(sum(r[j] for r in counts))
        except (ValueError, IndexError, TypeError):
            return None

    parts = [
        f"<p><b>Estimator:</b> {esc(a.get('estimator') or 'not recorded')}. All intervals in this section are {conf:.0%} confidence intervals of that estimator, "
        f"from the reference sample (estimate ± {flags.z:.2f} standard errors, SE); a dagger marks one the sample cannot support, with a Wilson interval beneath it.</p>",
        f"<p>Reference sample: {esc(sample.get('n', DASH))} points.</p>",
    ]
    strata = a.get("strata") or []
    if strata:
        rows = [[_class_label(str(s.get("name"))), num(s.get("pixels"), 0), num(s.get("area_ha"), 1), esc(s.get("n_planned", DASH)), esc(s.get("n_used", DASH))] for s in strata]
        parts.append(
            '<h3>Sampling strata</h3><table><thead><tr><th>stratum</th><th class="num">pixels</th><th class="num">area, ha</th><th class="num">points planned</th>'
            f'<th class="num">points used</th></tr></thead><tbody>{_rows(rows, ("", "num", "num", "num", "num"))}</tbody></table>'
        )
    parts.append(_matrix(a))

    ov = a.get("overall") or {}
    parts.append(
        f"<h3>Accuracy</h3><p><b>Overall accuracy:</b> {num(ov.get('estimate'))} (SE {num(ov.get('se'))}, {ci} {flags.interval(ov, points=n_all) if ov else DASH}): "
        "the estimated share of the region's area where the map's class agrees with the reference.</p>"
    )
    users, producers = a.get("users") or {}, a.get("producers") or {}
    names = list(dict.fromkeys(list(a.get("map_classes") or []) + list(a.get("classes") or [])))

    def acc(d: Mapping[str, Any] | None, present: bool, why: str, points: int | None) -> str:
        if present and d is None:
            # One cell across estimate, SE and interval, so the reason does not squeeze the table.
            return f'<td colspan="3" class="muted">not estimable ({why})</td>'
        return "".join(f'<td class="num">{c}</td>' for c in (flags.cells(d, points=points) if present else [DASH] * 3))

    trs = []
    for c in names:
        u = acc(users.get(c), c in users, "no sample mapped in this class", row_n(c))
        p = acc(producers.get(c), c in producers, "no reference sample of this class", col_n(c))
        trs.append(f'<tr><td class="cls">{_class_label(c)}</td>{u}{p}</tr>')
    parts.append(
        '<table><thead><tr><th rowspan="2">class</th><th colspan="3">user\'s accuracy (map → reference)</th><th colspan="3">producer\'s accuracy (reference → map)</th></tr>'
        f'<tr><th class="num">estimate</th><th class="num">SE</th><th class="num">{ci}</th><th class="num">estimate</th><th class="num">SE</th><th class="num">{ci}</th></tr></thead>'
        f"<tbody>{''.join(trs)}</tbody></table>"
        '<p class="caption">User\'s accuracy: of the area the map puts in a class, the share the reference puts there too (errors of commission). '
        "Producer's accuracy: of the area the reference puts in a class, the share the map finds (errors of omission).</p>"
    )

    areas = a.get("area_ha") or {}
    rows = [[_class_label(c), num(d.get("mapped_ha"), 1), *flags.cells(d, 1, area=True, points=n_all)] for c, d in areas.items() if isinstance(d, Mapping)]
    after = a.get("after_cutoff")
    if after:
        rows.append([f"converted after {esc(after.get('cutoff_year'))}", num(after.get("mapped_ha"), 1), *flags.cells(after, 1, area=True, points=n_all)])
    parts.append(
        '<h3>Class areas</h3><table><thead><tr><th>class</th><th class="num">map (pixel count), ha</th><th class="num">sample-based estimate, ha</th><th class="num">SE, ha</th>'
        f'<th class="num">{ci}, ha</th></tr></thead><tbody>{_rows(rows, ("", "num", "num", "num", "num"))}</tbody></table>'
    )

    t = a.get("timing") or {}
    if t:
        tn = int(t["n"]) if _finite(t.get("n")) else None
        rows = [["exact year", *flags.cells(t.get("exact"), points=tn)], ["within one year", *flags.cells(t.get("within1"), points=tn)]]
        parts.append(
            f"<h3>Timing accuracy</h3><p>On the {esc(t.get('n', DASH))} sample points that both the map and the reference call a conversion, "
            "how often the mapped onset year matches the reference year:</p>"
            f'<table><thead><tr><th>agreement</th><th class="num">estimate</th><th class="num">SE</th><th class="num">{ci}</th></tr></thead>'
            f"<tbody>{_rows(rows, ('', 'num', 'num', 'num'))}</tbody></table>"
        )
    else:
        parts.append(_notrun("Timing accuracy not assessed."))
    return head + "".join(parts) + flags.footnote() + "</section>"


def _validation_section(a: dict[str, Any] | None) -> str:
    head = '<section id="calibration"><h2>4. Calibration on held-out data</h2>'
    if a is None:
        return head + _notrun("Accuracy assessment not run: no assessment.json, so the model's validation record is not at hand.") + "</section>"
    v = a.get("validation")
    if not v:
        return head + _notrun("The model carries no validation record: its calibration on held-out data cannot be shown.") + "</section>"
    split = {"test": "test split", "val": "validation split"}.get(str(v.get("split")), f"{v.get('split')} split")  # words, e.g. "test split"
    figs = []
    if v.get("reliability"):
        figs.append(
            f"<figure>{_img(figures.reliability_diagram(v['reliability'], ece=v.get('ece'), split=split), 'Reliability diagram')}"
            '<figcaption class="caption">Points binned by their p_conversion: the bin\'s mean probability against the share that were conversions. '
            "On the dashed line, a probability of 0.7 means about 7 conversions in 10 such points; below it the model is over-confident, above it under-confident. "
            "Bars: points per bin.</figcaption></figure>"
        )
    cov = v.get("interval_coverage") or []
    if cov:
        figs.append(
            f"<figure>{_img(figures.interval_coverage_plot(cov), 'Interval coverage')}"
            '<figcaption class="caption">For each nominal level, the share of held-out conversions whose true year lies inside the onset-year interval of that level. '
            "Below the dashed line the intervals are too narrow. Whole-year intervals cannot hold exactly any level, so each asks the pixel's year distribution for the mass "
            "whose coverage on the validation split was nearest the level (the table's last column)"
            + ("; this split was not used to choose it" if v.get("split") == "test" else "")
            + ".</figcaption></figure>"
        )
    rows = [[pct(c.get("level"), 0), pct(c.get("coverage")), esc(c.get("n", DASH)), pct(c.get("mass"), 0) if _finite(c.get("mass")) else DASH] for c in cov]
    reading = _coverage_words(cov)
    table = (
        '<table><thead><tr><th class="num">nominal level</th><th class="num">observed coverage</th><th class="num">conversions</th><th class="num">mass asked</th></tr></thead>'
        f"<tbody>{_rows(rows, ('num', 'num', 'num', 'num'))}</tbody></table>"
        if rows
        else ""
    )
    return (
        head + f"<p>From the model's {esc(split)} ({esc(v.get('n', DASH))} points, held out from training in separate spatial blocks). "
        f"Expected calibration error of p_conversion: {num(v.get('ece'))}. These points come from the training sample's region and class mix; on another region the calibration may differ.</p>"
        + f'<div class="figrow">{"".join(figs)}</div>'
        + reading
        + table
        + "</section>"
    )


#: Verdict thresholds of plots.json in words ({v}: the value).
_THRESHOLDS: dict[str, str] = {
    "strong_min_ha": "strong evidence from {v:g} ha converted after the cutoff even at the low end of the range",
    "review_min_ha": "review from {v:g} ha expected converted after the cutoff, or mapped in the cutoff's own year",
    "review_min_share": "review from {v:.1%} of the mapped area expected converted after the cutoff",
    "min_mean_clear": "review below {v:g} clear views per pixel on average",
    "min_mapped_share": "review below {v:.0%} of the plot mapped",
}


def _threshold_words(th: Mapping[str, Any]) -> str:
    out = []
    for k, v in th.items():
        if k in _THRESHOLDS and _finite(v):
            out.append(_THRESHOLDS[k].format(v=float(v)))
        else:
            out.append(f"{str(k).replace('_', ' ')}: {v}")
    return "; ".join(out)


def _evidence_block(pages: Sequence[Mapping[str, Any]], folder: Path | None, note: str | None) -> str:
    """The evidence pages: each in a collapsible block, embedded (the first :data:`MAX_EMBEDDED`), the rest linked as files."""
    head = '<h3 id="evidence">Evidence pages</h3>'
    if note:
        return head + _notrun(note)
    if not pages:
        return head + _notrun("No evidence pages: no plot was flagged or asked for, or the plot check ran with evidence.enabled=false.")
    blocks = []
    for k, pg in enumerate(pages):
        pid = str(pg.get("id"))
        words, css = VERDICTS.get(pg.get("verdict"), (str(pg.get("verdict")), "v-none"))
        onset = f"mapped onset {esc(pg['onset_year'])}" if pg.get("onset_year") is not None else "no conversion mapped"
        summary = f'<summary><code>{esc(pid)}</code> <span class="badge {css}">{esc(words)}</span> <span class="muted">{onset}; {esc(pg.get("clear_views", DASH))} clear views</span></summary>'
        f = (folder / str(pg.get("file"))) if folder is not None else None
        if k < MAX_EMBEDDED and f is not None and f.is_file():
            body = _img(f.read_bytes(), f"Evidence page of plot {pid}")
        elif f is not None and f.is_file():
            body = f'<p>Not embedded (the report embeds the first {MAX_EMBEDDED}): <a href="{esc(FOLDER)}/{esc(pg.get("file"))}">{esc(FOLDER)}/{esc(pg.get("file"))}</a> beside this report.</p>'
        else:
            body = _notrun(f"The page's file {pg.get('file')} is missing; run `plantation farmplots` again.")
        # The anchor sits inside the block: following a link to it opens the block (the browser reveals a closed details' content it scrolls to).
        blocks.append(f'<details class="evidence">{summary}<div id="{esc(_anchor(pg))}">{body}</div></details>')
    return (
        head + '<p class="muted">One page per plot that needs a look, in the order of the table: the plot (cyan) over the mapped onset years; chips of the region\'s own imagery, '
        "true colour (red, green, blue; reflectance 0–0.15) and false colour (SWIR1, NIR, red as red, green, blue; 0–0.40, 0–0.50, 0–0.15: vegetation green, cleared land magenta to brown), "
        "on the last clear view before the mapped onset year and the first clear views from it on; the plot's median NDVI and NBR on every clear view, with the onset year "
        "and its credible interval shaded and the cutoff dashed; and the numbers behind the verdict in words. A date is a clear view when at least half the plot is free of cloud, shadow and fill. "
        "Open a block to see its page.</p>" + "".join(blocks)
    )


def _plots_section(p: dict[str, Any] | None, pages: Mapping[str, Mapping[str, Any]] | None = None, evidence_dir: Path | None = None, evidence_note: str | None = None) -> str:
    head = '<section id="plots"><h2>5. Farm plots</h2>'
    if p is None:
        return head + _notrun("Plot check not run: no plots.json in this folder.") + "</section>"
    cut = p.get("cutoff") or {}
    level = p.get("interval_level")
    # after_lo/hi_ha are a range of the area under the map's own model, not a sampling interval.
    lvl = f"{level:.0%} range" if _finite(level) else "range"
    meta = [
        f"Plots file: <code>{esc(Path(str(p.get('plots_file') or DASH)).name)}</code>.",
        f"Cutoff date: {esc(cut.get('date', DASH))} (conversions in onset years after {esc(cut.get('year', DASH))} count as after the cutoff).",
    ]
    if cut.get("straddle_year") is not None:
        meta.append(
            f"The cutoff falls inside {esc(cut['straddle_year'])}: a conversion mapped in that year may lie on either side of it, since onsets are resolved to the year; its area is shown separately."
        )
    th = p.get("thresholds") or {}
    if th:
        meta.append("Verdict thresholds: " + esc(_threshold_words(th)) + ".")
    counts = p.get("counts") or {}
    if counts:
        names = {"strong_evidence": "strong evidence", "review": "review", "low_evidence": "low evidence", "problem": "not measured", "problems": "not measured"}
        meta.append("Plots by verdict: " + esc(", ".join(f"{names.get(k, k.replace('_', ' '))}: {v}" for k, v in counts.items())) + ".")
    pages = pages or {}
    rows = []
    for r in sorted((r for r in p.get("plots") or [] if isinstance(r, Mapping)), key=_attention):
        verdict = r.get("verdict")
        words, css = VERDICTS.get(verdict, (str(verdict).replace("_", " "), "v-none"))
        years = r.get("years") or {}
        ys = "<br>".join(f'<span class="yr">{esc(y)}: {num(ha, 2)} ha</span>' for y, ha in sorted(years.items(), key=lambda kv: str(kv[0]))) if years else DASH
        after = num(r.get("expected_after_ha"), 2)
        if _finite(r.get("expected_after_ha")):
            after += f'<span class="n">{esc(lvl)} {interval(r.get("after_lo_ha"), r.get("after_hi_ha"), 2)}</span>'
        if _finite(r.get("straddle_ha")) and r["straddle_ha"] > 0:
            after += f'<span class="n">{num(r["straddle_ha"], 2)} ha in {esc(cut.get("straddle_year", "the straddle year"))}</span>'
        area = num(r.get("area_ha"), 2)
        if _finite(r.get("mapped_share")):
            area += f'<span class="n">{pct(r["mapped_share"], 0)} mapped</span>'
        status = r.get("status")
        page = pages.get(str(r.get("id")))
        link = f'<br><a href="#{esc(_anchor(page))}">evidence page</a>' if page else ""
        rows.append(
            f'<tr class="{"" if status == "ok" else "problem"}"><td><code>{esc(r.get("id")) or DASH}</code>{link}</td><td>{esc(status)}</td><td class="num">{area}</td>'
            f'<td class="num">{after}</td><td class="num">{pct(r.get("share_after"))}</td><td>{ys}</td><td class="num">{num(r.get("mean_clear"), 1)}</td>'
            f'<td><span class="badge {css}">{esc(words)}</span></td><td class="reasons">{"<br>".join(esc(x) for x in r.get("reasons") or []) or DASH}</td></tr>'
        )
    table = (
        '<div class="wide"><table class="plots"><thead><tr><th>plot</th><th>status</th><th class="num">area, ha</th>'
        f'<th class="num">expected converted after cutoff, ha (beneath: {esc(lvl)} under the map\'s model)</th><th class="num">share of mapped area converted after cutoff</th>'
        "<th>area mapped as converted, by onset year</th>"
        f'<th class="num">mean clear views</th><th>verdict</th><th>reasons</th></tr></thead><tbody>{"".join(rows)}</tbody></table></div>'
        if rows
        else _notrun("plots.json lists no plots.")
    )
    probs = p.get("problems") or []
    plist = ""
    if probs:
        items = "".join(
            f"<li>plot #{esc(q.get('index'))}{' (' + '<code>' + esc(q.get('id')) + '</code>)' if q.get('id') is not None else ''}: <b>{esc(q.get('problem'))}</b> — {esc(q.get('detail'))}</li>"
            for q in probs
        )
        plist = f"<h3>Problems with the plot file</h3><ul>{items}</ul>"
    return (
        head
        + f'<p class="muted">{" ".join(meta)}</p>'
        + '<p>A verdict grades the <em>evidence</em> the map holds for conversion after the cutoff: "strong evidence" and "review" call for a look at high-resolution imagery '
        'and, where needed, a field visit; "low evidence" means the map shows little, which is not proof that nothing happened (see the cautions).</p>'
        + f'<p class="muted">Expected area: the sum over the plot\'s pixels of their probability of conversion after the cutoff times the area of the pixel the plot covers. '
        f"The {esc(lvl)} beneath it assumes the plot's pixels convert together, as a holding cleared in one piece does; it is the spread of the area under the map's own model, "
        "not a sampling interval, and the model's errors are not in it. Share: expected area over the plot's mapped area.</p>"
        + table
        + plist
        + _evidence_block(list(pages.values()), evidence_dir, evidence_note)
        + "</section>"
    )


def _coverage_words(cov: Sequence[Mapping[str, Any]]) -> str:
    """The coverage check read out in words: which levels hold, over-cover or under-cover, and what that means for the map's onset intervals."""
    pts = [(float(c["level"]), float(c["coverage"])) for c in cov if _finite(c.get("level")) and _finite(c.get("coverage"))]
    if not pts:
        return ""
    tol = 0.05
    over = [(lv, cv) for lv, cv in pts if cv > lv + tol]
    under = [(lv, cv) for lv, cv in pts if cv < lv - tol]
    said = "; ".join(f"the {lv:.0%} intervals held the true year for {cv:.0%}" for lv, cv in pts)
    if over and not under:
        verdict = (
            "The intervals over-cover: they are wider than their nominal level says, so the onset year is better known than a map interval suggests, "
            "and a map interval is a cautious range rather than a calibrated one."
        )
    elif under and not over:
        verdict = "The intervals under-cover: they are narrower than their nominal level says, so the true year falls outside a map interval more often than its level implies."
    elif over and under:
        verdict = "The intervals over-cover at some levels and under-cover at others: read a map interval's level as approximate."
    else:
        verdict = f"Each level holds to within {tol:.0%}: the intervals mean what their level says, on data like the held-out split."
    return f"<p><b>Reading the coverage check:</b> on held-out conversions, {esc(said)}. {esc(verdict)}</p>"


def _imagery_section(ev: Mapping[str, Any] | None, note: str | None) -> str:
    """The imagery the map and the evidence pages were made from: sensors, dates, and the share of clear views by year and month."""
    head = '<section id="imagery"><h2>6. Imagery</h2>'
    im = (ev or {}).get("imagery")
    if not isinstance(im, Mapping):
        return head + _notrun(note or "Imagery not described: the plot check ran without evidence pages (evidence.enabled=false), which is where the imagery is summarised.") + "</section>"
    sensors = im.get("sensors") or {}
    named = {k: v for k, v in sensors.items() if k != "unnamed"}
    if named:
        sens = ", ".join(f"{k.replace('_', ' ')}: {v} dates" for k, v in named.items())
        if "unnamed" in sensors:
            sens += f", unnamed: {sensors['unnamed']} dates"
    else:
        sens = "not named by the region file (one sensor assumed)"
    rows = [
        ("region", esc(im.get("region", DASH))),
        ("tiles", esc(", ".join(str(t) for t in im.get("tiles") or []) or DASH)),
        ("dates", f"{esc(im.get('dates', DASH))}, from {esc(im.get('first') or DASH)} to {esc(im.get('last') or DASH)}"),
        ("sensors", esc(sens)),
        ("bands", esc(", ".join(str(b) for b in im.get("bands") or []) or DASH)),
    ]
    by_year = im.get("dates_by_year") or {}
    if by_year:
        rows.append(("dates per year", esc(", ".join(f"{y}: {n}" for y, n in by_year.items()))))
    table = "<table><tbody>" + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows) + "</tbody></table>"
    grid = im.get("clear_share_by_year_month") or {}
    clear = ""
    if grid:
        months = sorted({int(m) for ms in grid.values() for m in ms})
        mname = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"]

        def cell(v: Any) -> str:
            if not _finite(v):
                return "<td>—</td>"
            # Shade from white (no clear view) to green (all clear): inline style, allowed by the page's policy.
            g = int(round(255 - 120 * float(v)))
            return f'<td style="background: rgb({g}, 255, {g})">{pct(v, 0)}</td>'

        by_y = im.get("clear_share_by_year") or {}
        head_row = "".join(f"<th>{mname[m - 1]}</th>" for m in months) + "<th>year</th>"
        body = "".join(f"<tr><th>{esc(y)}</th>" + "".join(cell(ms.get(str(m))) for m in months) + cell(by_y.get(y)) + "</tr>" for y, ms in grid.items())
        by_m = im.get("clear_share_by_month") or {}
        if by_m:
            body += '<tr class="total"><th>all years</th>' + "".join(cell(by_m.get(str(m))) for m in months) + "<td></td></tr>"
        clear = (
            "<h3>Clear-view share by year and month</h3>"
            f'<div class="wide"><table class="clear"><thead><tr><th>year</th>{head_row}</tr></thead><tbody>{body}</tbody></table></div>'
            f'<p class="caption">The share of the region\'s pixels free of cloud, shadow and fill on the dates of each month (a month without an image is a dash); '
            f"from {esc(im.get('clear_source') or 'the survey')}. "
            "Where it is low a conversion can go unseen for months, and its year is less certain.</p>"
        )
    else:
        clear = _notrun("Clear-view shares not at hand" + (f": {im['clear_note']}" if im.get("clear_note") else "") + ".")
    return head + table + clear + "</section>"


def _evidence(folder: Path, p: dict[str, Any] | None) -> tuple[dict[str, Any] | None, str | None]:
    """The evidence record beside plots.json, if it goes with it; else None and, where there is one, why it is left out."""
    if p is None or not (folder / FOLDER / EVIDENCE_JSON).is_file():
        return None, None
    try:
        doc = read_evidence(folder / FOLDER)
    except FileFormatError as exc:
        return None, f"Evidence pages left out: {exc}"
    if doc.get("plots_json_sha256") != sha256_of(folder / PLOTS_JSON):
        return None, "Evidence pages left out: they were drawn for an earlier plot check (plots.json changed since); run `plantation farmplots` again to redraw them."
    return doc, None


def _map_level(map_dir: Path | None) -> float | None:
    """The nominal level of the map's onset intervals (its tiles' ``interval_level`` tag; the first tile's)."""
    if map_dir is None:
        return None
    for f in sorted(map_dir.glob("*.tif")):
        try:
            with rasterio.open(f) as src:
                v = src.tags().get("interval_level")
            return float(v) if v not in (None, "") else None
        except (rasterio.errors.RasterioIOError, ValueError):
            continue
    return None


def _correction_rows(manifest: dict[str, Any] | None, p: dict[str, Any] | None) -> list[tuple[str, str]]:
    """Which probability correction the map carries (from its manifest) and the one the plot check read, if that differs."""
    rows: list[tuple[str, str]] = []
    here = None
    if manifest is not None:
        texts = sorted({describe_correction(t.get(CORRECTION_TAG)) for t in manifest.get("tiles", {}).values()})
        here = "; ".join(texts) if texts else None
        if here:
            rows.append(("map probabilities", esc(here)))
    # plots.json records a correction only when the map carried one.
    used = (p or {}).get("probability_correction_text") or describe_correction(None)
    if p is not None and used != here:
        rows.append(("map probabilities in the plot check", esc(used)))
    return rows


def _provenance_section(
    a: dict[str, Any] | None, p: dict[str, Any] | None, folder: Path, map_dir: Path | None, generated: str, manifest_problem: str | None = None, manifest: dict[str, Any] | None = None
) -> str:
    head = '<section id="provenance"><h2>7. Provenance</h2>'
    rows: list[tuple[str, str]] = []
    prov = (a or {}).get("provenance") or {}
    model = prov.get("model") or {}
    if a is not None:
        rows += [
            ("model", f"<code>{esc(_short_path(model.get('path'), keep=2))}</code>"),
            ("model sha256", f'<span class="hash">{esc(model.get("sha256") or DASH)}</span>'),
            ("model trained for region", esc(model.get("region") or DASH)),
            ("model package version", esc(model.get("package_version") or DASH)),
            ("training labels fingerprint", f'<span class="hash">{esc(prov.get("labels_fingerprint") or model.get("labels_fingerprint") or DASH)}</span>'),
        ]
        s = a.get("sample") or {}
        rows += [
            ("reference sample file", f"<code>{esc(_short_path(s.get('path')))}</code> ({esc(s.get('n', DASH))} points)"),
            ("reference sample sha256", f'<span class="hash">{esc(s.get("sha256") or DASH)}</span>' + _check(_locate(s.get("path"), folder), s.get("sha256"))),
        ]
        mf = map_dir / MANIFEST if map_dir is not None else None
        rows.append(("map manifest sha256", f'<span class="hash">{esc(prov.get("map_manifest_sha256") or DASH)}</span>' + _check(mf, prov.get("map_manifest_sha256"))))
        rows.append(("assessment generated", _day(a.get("generated"))))
    if manifest_problem:
        rows.append(("map manifest", f'<span class="bad">unreadable, left out: {esc(manifest_problem)}</span>'))
    rows += _correction_rows(manifest, p)
    if p is not None:
        rows += [
            ("plots file", f"<code>{esc(_short_path(p.get('plots_file')))}</code>"),
            ("plots file sha256", f'<span class="hash">{esc(p.get("plots_sha256") or DASH)}</span>' + _check(_locate(p.get("plots_file"), folder), p.get("plots_sha256"))),
        ]
    rows.append(("report generated", f"{esc(generated)} by plantation {esc(__version__)}"))
    table = "<table><tbody>" + "".join(f"<tr><th>{esc(k)}</th><td>{v}</td></tr>" for k, v in rows) + "</tbody></table>"
    cfg = prov.get("config")
    details = f"<details><summary>Resolved configuration of the assessment</summary><pre>{esc(cfg)}</pre></details>" if cfg else _notrun("No resolved configuration recorded.")
    return head + table + details + "</section>"


def _cautions_section(simulated: bool) -> str:
    items = [
        "A conversion the images never show cleared is mapped as forest, with a low probability of conversion: for example a clearing after a pixel's last clear view, "
        "which is common in the last year of the series. The map says little about the last months it covers.",
        "Look-alikes: selective logging and fire followed by regrowth, forest cleared for crops or pasture, and seasonal cropland can resemble a conversion in the imagery. "
        "Some are mapped as conversion, some conversions as other land.",
        "Onsets are resolved to the year, not the date. A conversion in the year the cutoff falls in may lie on either side of the cutoff.",
        "Cloud-limited pixels carry less evidence: where clear views are few the year is less certain and a conversion may be missed; pixels with too few clear dates are no data.",
        "The areas to quote are the sample-based estimates with their confidence intervals. The map's pixel counts carry the map's errors and are shown only for comparison.",
        "Probabilities are learnt from a reference sample: they say how strongly the imagery points to a conversion, not that one happened.",
        "Plot verdicts are evidence for review with high-resolution imagery and field checks, not a finding about any plot, owner or producer.",
        "Local law and licensed practice govern any decision taken on the basis of this report.",
    ]
    if simulated:
        items.insert(0, "<b>The reference labels of this assessment were filled from simulated truth (demonstration only), not interpreted by people.</b>")
    return '<section id="cautions"><h2>8. Cautions: what the map can and cannot show</h2><ul class="cautions">' + "".join(f"<li>{i}</li>" for i in items) + "</ul></section>"


def _manifest(map_dir: Path | None) -> tuple[dict[str, Any] | None, str | None]:
    """The map folder's manifest (None without one) and, if it is malformed, why: the report is built without it then."""
    if map_dir is None:
        return None, None
    try:
        return read_manifest(map_dir), None
    except FileFormatError as exc:
        return None, str(exc)


def _manifest_dates(manifest: dict[str, Any] | None) -> str | None:
    """The day (or range of days) the map's tiles were finished."""
    tiles = (manifest or {}).get("tiles", {})
    days = sorted(str(t.get("finished"))[:10] for t in tiles.values() if t.get("finished"))
    if not days:
        return None
    return days[0] if days[0] == days[-1] else f"{days[0]} to {days[-1]}"


def _manifest_years(manifest: dict[str, Any] | None) -> list[int]:
    """The onset years the map's tiles can hold (read_manifest checked they are years)."""
    tiles = (manifest or {}).get("tiles", {})
    return sorted({int(y) for t in tiles.values() for y in t.get("converted_ha") or {}})


# --------------------------------------------------------------------------- entry point


def build_report(folder: Path, *, map_dir: Path | None = None) -> Path:
    """Write ``folder/report.html`` from the ``assessment.json`` and/or ``plots.json`` found there.

    The map folder (for the quicklooks and the manifest check) is ``map_dir``
    if given, else the ``map_dir`` recorded in the assessment or the plot
    check (as given if absolute, else relative to ``folder`` or the working
    directory). The page is self-contained and written atomically. A
    malformed ``manifest.json`` in the map folder does not stop the page: it
    is left out and the provenance section says why.

    Raises:
        PlantationError: the folder holds neither file.
        LabelError: ``assessment.json`` is malformed (:func:`plantation.assessment.assess.read_assessment`).
        RegionError: ``plots.json`` is malformed (:func:`plantation.farmplots.cutoff.read_plots_json`).
    """
    folder = Path(folder)
    a = read_assessment(folder / ASSESSMENT_NAME) if (folder / ASSESSMENT_NAME).is_file() else None
    p = read_plots_json(folder / PLOTS_JSON) if (folder / PLOTS_JSON).is_file() else None
    if a is None and p is None:
        raise PlantationError(f"{folder}: neither assessment.json nor plots.json here; run the assessment or the plot check first")
    if map_dir is not None:
        mdir: Path | None = Path(map_dir) if Path(map_dir).is_dir() else None
    else:
        mdir = next((d for d in (_locate((a or {}).get("map_dir"), folder), _locate((p or {}).get("map_dir"), folder)) if d is not None and d.is_dir()), None)

    generated = datetime.now(UTC).isoformat(timespec="seconds")
    simulated = bool((a or {}).get("simulated_reference"))
    manifest, manifest_problem = _manifest(mdir)
    years = sorted({int(r["year"]) for r in (a or {}).get("conversion_by_year") or [] if r.get("year") is not None} | set(_manifest_years(manifest)))
    cutoff = ((a or {}).get("after_cutoff") or {}).get("cutoff_year")
    if cutoff is None:
        cutoff = ((p or {}).get("cutoff") or {}).get("year")
    maps_html, tile_region = _map_section(mdir, years, cutoff)
    ev, ev_note = _evidence(folder, p)
    pages = {str(pg.get("id")): pg for pg in (ev or {}).get("pages") or []}
    map_level = _map_level(mdir)

    region = (a or {}).get("region") or tile_region or "region not recorded"
    dates: list[tuple[str, str]] = []
    if a is not None:
        dates.append(("assessment generated", _day(a.get("generated"))))
    mapped = _manifest_dates(manifest)
    if mapped:
        dates.append(("map tiles finished", esc(mapped)))
    if p is not None:
        when = p.get("generated") or datetime.fromtimestamp((folder / PLOTS_JSON).stat().st_mtime, UTC).isoformat(timespec="seconds")
        dates.append(("plot check written", _day(when)))
        dates.append(("cutoff date", esc((p.get("cutoff") or {}).get("date", DASH))))
    elif cutoff is not None:
        dates.append(("cutoff year", esc(cutoff)))
    dates.append(("report generated", _day(generated) + " UTC"))

    body = "".join(
        [
            _header(region, dates, simulated),
            _summary_section(a, p, pages, map_level),
            _notice_and_contents(a is not None),
            maps_html,
            _areas_section(a),
            _accuracy_section(a),
            _validation_section(a),
            _plots_section(p, pages, folder / FOLDER if ev is not None else None, ev_note),
            _imagery_section(ev, ev_note if p is not None else None),
            _provenance_section(a, p, folder, mdir, generated, manifest_problem, manifest),
            _cautions_section(simulated),
        ]
    )
    page = (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>Plantation conversion report: {esc(region)}</title><style>{_CSS}</style></head>"
        f'<body>{body}<footer class="muted"><p>{esc(NOTICE)}</p></footer></body></html>\n'
    )
    out = folder / REPORT_NAME
    tmp = out.with_name(out.name + ".partial")
    try:
        tmp.write_text(page, encoding="utf-8")
        os.replace(tmp, out)
    finally:
        tmp.unlink(missing_ok=True)
    return out
