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
them. Every string that comes from a JSON file is escaped with :func:`html.escape`
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
from typing import Any

import rasterio

from plantation import __version__
from plantation.assessment.assess import ASSESSMENT_NAME, read_assessment
from plantation.errors import FileFormatError, PlantationError
from plantation.farmplots.cutoff import PLOTS_JSON, read_plots_json
from plantation.mapping.folder import CORRECTION_TAG, MANIFEST, NOTICE, describe_correction, read_manifest, sha256_of
from plantation.mapping.styles import CLASS_STYLE
from plantation.reference.labels import LABEL_CODES
from plantation.report import figures

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


def _header(region: str, dates: list[tuple[str, str]], simulated: bool, assessed: bool) -> str:
    items = "".join(f"<dt>{esc(k)}</dt><dd>{v}</dd>" for k, v in dates)
    sim = ""
    if simulated:
        sim = (
            '<div class="banner-sim" id="simulated-banner">Demonstration only: the reference labels of this assessment were filled from simulated truth, '
            "not interpreted by people. Its accuracies and areas show how the method works; they say nothing about a real landscape.</div>"
        )
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
            ("plots", "Farm plots"),
            ("provenance", "Provenance"),
            ("cautions", "Cautions"),
        )
    )
    return (
        f"<header><h1>Conversion of natural forest to tree-crop plantation: {esc(region)}</h1>"
        f'<dl class="meta">{items}</dl>'
        f'<div class="notice" role="note">{esc(NOTICE)}{areas}</div>'
        f"{sim}<nav><ol>{toc}</ol></nav></header>"
    )


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
    return head + body + "</section>", region


def _est_cells(d: Mapping[str, Any] | None, digits: int = 3) -> list[str]:
    if not d or not _finite(d.get("estimate")):
        return [DASH, DASH, DASH]
    return [num(d["estimate"], digits), num(d.get("se"), digits), interval(d.get("lo"), d.get("hi"), digits)]


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
    tr = []
    for r in rows:
        late = cutoff is not None and r.get("year") is not None and int(r["year"]) > int(cutoff)
        cells = [esc(r.get("year")), num(r.get("mapped_ha"), 1), *_est_cells(r, 1)]
        tr.append(f'<tr class="{"after" if late else ""}">' + "".join(f'<td class="num">{c}</td>' for c in cells) + "</tr>")
    if after:
        cells = [f"after {esc(cutoff)}", num(after.get("mapped_ha"), 1), *_est_cells(after, 1)]
        tr.append('<tr class="total">' + "".join(f'<td class="num">{c}</td>' for c in cells) + "</tr>")
    conv = (a.get("area_ha") or {}).get("conversion")
    total = ""
    if conv:
        total = (
            f"<p>All years together: the map counts {num(conv.get('mapped_ha'), 1)} ha as converted; the sample-based estimate is {num(conv.get('estimate'), 1)} ha "
            f"({conf:.0%} interval {interval(conv.get('lo'), conv.get('hi'), 1)} ha).</p>"
        )
    return (
        head + f"<figure>{_img(fig, 'Converted area by onset year')}"
        '<figcaption class="caption">Hatched grey: the map (pixel count), the area of pixels mapped as converted in each year. '
        f"Red: the sample-based estimate, with its {conf:.0%} confidence interval. "
        "The pixel count carries every error of the map; the estimate corrects for them with the reference sample, and it is the estimate that should be quoted.</figcaption></figure>"
        + total
        + f'<table><thead><tr><th class="num">onset year</th><th class="num">map (pixel count), ha</th><th class="num">sample-based estimate, ha</th><th class="num">SE, ha</th>'
        f'<th class="num">{conf:.0%} interval, ha</th></tr></thead><tbody>{"".join(tr)}</tbody></table>' + "</section>"
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
    ci = f"{conf:.0%} interval"
    sample = a.get("sample") or {}
    parts = [
        f"<p><b>Estimator:</b> {esc(a.get('estimator') or 'not recorded')}. All intervals are {conf:.0%} confidence intervals from the sample; SE is the standard error.</p>",
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
        f"<h3>Accuracy</h3><p><b>Overall accuracy:</b> {num(ov.get('estimate'))} (SE {num(ov.get('se'))}, {ci} {interval(ov.get('lo'), ov.get('hi'))}): "
        "the estimated share of the region's area where the map's class agrees with the reference.</p>"
    )
    users, producers = a.get("users") or {}, a.get("producers") or {}
    names = list(dict.fromkeys(list(a.get("map_classes") or []) + list(a.get("classes") or [])))

    def acc(d: Mapping[str, Any] | None, present: bool, why: str) -> str:
        if present and d is None:
            # One cell across estimate, SE and interval, so the reason does not squeeze the table.
            return f'<td colspan="3" class="muted">not estimable ({why})</td>'
        return "".join(f'<td class="num">{c}</td>' for c in (_est_cells(d) if present else [DASH] * 3))

    trs = []
    for c in names:
        u = acc(users.get(c), c in users, "no sample mapped in this class")
        p = acc(producers.get(c), c in producers, "no reference sample of this class")
        trs.append(f'<tr><td class="cls">{_class_label(c)}</td>{u}{p}</tr>')
    parts.append(
        '<table><thead><tr><th rowspan="2">class</th><th colspan="3">user\'s accuracy (map → reference)</th><th colspan="3">producer\'s accuracy (reference → map)</th></tr>'
        f'<tr><th class="num">estimate</th><th class="num">SE</th><th class="num">{ci}</th><th class="num">estimate</th><th class="num">SE</th><th class="num">{ci}</th></tr></thead>'
        f"<tbody>{''.join(trs)}</tbody></table>"
        '<p class="caption">User\'s accuracy: of the area the map puts in a class, the share the reference puts there too (errors of commission). '
        "Producer's accuracy: of the area the reference puts in a class, the share the map finds (errors of omission).</p>"
    )

    areas = a.get("area_ha") or {}
    rows = [[_class_label(c), num(d.get("mapped_ha"), 1), *_est_cells(d, 1)] for c, d in areas.items() if isinstance(d, Mapping)]
    after = a.get("after_cutoff")
    if after:
        rows.append([f"converted after {esc(after.get('cutoff_year'))}", num(after.get("mapped_ha"), 1), *_est_cells(after, 1)])
    parts.append(
        '<h3>Class areas</h3><table><thead><tr><th>class</th><th class="num">map (pixel count), ha</th><th class="num">sample-based estimate, ha</th><th class="num">SE, ha</th>'
        f'<th class="num">{ci}, ha</th></tr></thead><tbody>{_rows(rows, ("", "num", "num", "num", "num"))}</tbody></table>'
    )

    t = a.get("timing") or {}
    if t:
        rows = [["exact year", *_est_cells(t.get("exact"))], ["within one year", *_est_cells(t.get("within1"))]]
        parts.append(
            f"<h3>Timing accuracy</h3><p>On the {esc(t.get('n', DASH))} sample points that both the map and the reference call a conversion, "
            "how often the mapped onset year matches the reference year:</p>"
            f'<table><thead><tr><th>agreement</th><th class="num">estimate</th><th class="num">SE</th><th class="num">{ci}</th></tr></thead>'
            f"<tbody>{_rows(rows, ('', 'num', 'num', 'num'))}</tbody></table>"
        )
    else:
        parts.append(_notrun("Timing accuracy not assessed."))
    return head + "".join(parts) + "</section>"


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
        + table
        + "</section>"
    )


def _plots_section(p: dict[str, Any] | None) -> str:
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
        meta.append("Verdict thresholds: " + esc(", ".join(f"{k} = {v}" for k, v in th.items())) + ".")
    counts = p.get("counts") or {}
    if counts:
        meta.append("Counts: " + esc(", ".join(f"{k.replace('_', ' ')}: {v}" for k, v in counts.items())) + ".")
    rows = []
    for r in p.get("plots") or []:
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
        rows.append(
            f'<tr class="{"" if status == "ok" else "problem"}"><td><code>{esc(r.get("id")) or DASH}</code></td><td>{esc(status)}</td><td class="num">{area}</td>'
            f'<td class="num">{after}</td><td class="num">{pct(r.get("share_after"))}</td><td>{ys}</td><td class="num">{num(r.get("mean_clear"), 1)}</td>'
            f'<td><span class="badge {css}">{esc(words)}</span></td><td class="reasons">{"<br>".join(esc(x) for x in r.get("reasons") or []) or DASH}</td></tr>'
        )
    table = (
        '<div class="wide"><table class="plots"><thead><tr><th>plot</th><th>status</th><th class="num">area, ha</th>'
        f'<th class="num">expected converted after cutoff, ha ({esc(lvl)})</th><th class="num">share of mapped area converted after cutoff</th>'
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
        "not a sampling interval, and the model's errors are not in it. Share: expected area over the plot's mapped area.</p>" + table + plist + "</section>"
    )


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
    head = '<section id="provenance"><h2>6. Provenance</h2>'
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
    return '<section id="cautions"><h2>7. Cautions: what the map can and cannot show</h2><ul class="cautions">' + "".join(f"<li>{i}</li>" for i in items) + "</ul></section>"


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
            _header(region, dates, simulated, a is not None),
            maps_html,
            _areas_section(a),
            _accuracy_section(a),
            _validation_section(a),
            _plots_section(p),
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
