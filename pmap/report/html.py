"""A self-contained HTML field report and a batch index, built from a run's output directory.

:func:`write_field_report` reads ``summary.json``'s dict and the PNGs of a run directory
(``maps/*.png``, and when present ``overview.png`` and ``diagnostics/*.png``) and writes
one HTML file: every picture is embedded as a base64 ``data:`` URI, the style sheet is
inline, there is no script, and a Content-Security-Policy forbids any fetch, so the file
opens the same offline, mailed or printed.  The only links are relative links to the
run's own files and in-page anchors.  :func:`write_batch_index` writes one page linking
the reports of several fields.

The zone table is machine-checkable: ``<table id="rate-zones">``, one ``<tr
data-zone-id=...>`` per rate polygon, and in each cell ``data-key`` (the key of
``summary["rate_polygons"][i]``) and ``data-value`` (that value as JSON text, unrounded).
The class table (``id="rate-classes"``, ``summary["zones"]``) and the field totals
(``id="field-totals"``, ``summary["totals"]``) carry the same attributes.

Pure string building with the standard library; the report reads results and never
recomputes them.
"""

from __future__ import annotations

import base64
import html
import json
import math
import numbers
import re
import urllib.parse
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = ["REPORT_NAME", "INDEX_NAME", "render_batch_index", "render_field_report",
           "write_batch_index", "write_field_report"]

#: File name of a field report inside its run directory.
REPORT_NAME = "report.html"
#: File name of the batch index.
INDEX_NAME = "index.html"

_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_DASH = "\u2013"

# No fetch of any kind: pictures are data: URIs, the style is inline, nothing else loads.
_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; "
        "form-action 'none'")

_CSS = """
:root { --ink: #1d1d1b; --muted: #5b5b57; --rule: #c9c9c2; --band: #f3f3ee; --warn: #8a3b00;
        --warn-bg: #fff4e0; --bad: #9b1c1c; --ok: #1f6b3a; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
       color: var(--ink); background: #fff; margin: 0 auto; max-width: 1200px;
       padding: 1rem 1.5rem 3rem; line-height: 1.45; font-size: 15px; }
h1 { font-size: 1.7rem; margin: .2rem 0 .3rem; }
h2 { font-size: 1.3rem; border-bottom: 2px solid var(--ink); padding-bottom: .2rem;
     margin-top: 2.2rem; }
h3 { font-size: 1.08rem; margin: 1.6rem 0 .5rem; }
h4 { font-size: .98rem; margin: 1rem 0 .4rem; }
p, li { max-width: 75ch; }
.muted, figcaption, .note { color: var(--muted); }
.basis { font-size: 1.02rem; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1rem;
           margin: .6rem 0; }
dl.facts dt { font-weight: 600; }
dl.facts dd { margin: 0; }
.cautions { border: 3px solid var(--warn); background: var(--warn-bg); padding: .8rem 1rem;
            margin: 1rem 0; }
.cautions h2 { border: 0; margin: 0 0 .3rem; color: var(--warn); font-size: 1.15rem; }
.cautions p { margin: .2rem 0; max-width: none; }
nav.toc ol { columns: 2; margin: .3rem 0; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .86rem; }
th, td { border: 1px solid var(--rule); padding: .2rem .45rem; vertical-align: top;
         text-align: left; }
thead th { background: var(--band); }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tfoot td, tfoot th { font-weight: 700; background: var(--band); }
tr.chosen td { font-weight: 700; }
.wide { overflow-x: auto; }
.figures { display: grid; grid-template-columns: repeat(auto-fill, minmax(340px, 1fr)); gap: 1rem; }
.figures.single { grid-template-columns: 1fr; }
.figures.diag { grid-template-columns: repeat(auto-fill, minmax(520px, 1fr)); }
figure { margin: 0; break-inside: avoid; page-break-inside: avoid; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: .85rem; margin-top: .2rem; }
ul.warnings li { margin-bottom: .35rem; }
.status-ok { color: var(--ok); font-weight: 700; }
.status-failed { color: var(--bad); font-weight: 700; }
.status-skipped { color: var(--muted); font-weight: 700; }
.error { color: var(--bad); white-space: pre-wrap; }
code { font-size: .9em; }
@media print {
  body { max-width: none; padding: 0; font-size: 10.5pt; }
  section.major { break-before: page; page-break-before: always; }
  h2, h3, h4 { break-after: avoid; page-break-after: avoid; }
  nav.toc { display: none; }
  img { max-width: 100% !important; }
  .figures { grid-template-columns: 1fr 1fr; }
  .figures.diag, .figures.single { grid-template-columns: 1fr; }
  .wide { overflow: visible; }
  table { font-size: 8pt; }
  a { color: inherit; text-decoration: none; }
  .cautions { break-inside: avoid; }
}
"""

# Map groups: (anchor, heading, explanation).  Variograms and the calibration plot are shown
# with the diagnostics, next to the figures they explain.
_GROUPS = (
    ("maps-prescription", "Prescription",
     "The rate zones and the rates they carry: what a spreader would apply."),
    ("maps-soil-tests", "Soil tests (kriged)",
     "Lab values interpolated between the samples (points on the maps)."),
    ("maps-soil-model", "Soil model",
     "Phosphorus pools and fixation of applied P from pmap's soil model."),
    ("maps-lime-environment", "Lime and environment",
     "Lime requirement, ground below the pH floor and the environmental P indices."),
    ("maps-uncertainty", "Uncertainty",
     "How far the estimates can be trusted: kriging variances, standard deviations and "
     "probabilities of falling below the critical level."),
    ("maps-other", "Other maps", ""),
)
_PRESCRIPTION_MAPS = ("product_zone_rate", "p2o5_zone_rate", "zones", "p2o5_rate", "stp_equivalent")
_SOIL_MODEL_MAPS = ("available_p", "fe_al_p", "ca_p", "occluded_p", "organic_p",
                    "fixation_risk", "fixation_mechanism", "fixation_class")
_LIME_ENV_MAPS = ("lime_rate", "lime_zones", "liming_available_p_gain", "low_ph_flag",
                  "p_saturation_ratio", "p_saturation_class")
_SOIL_TEST_MAPS = ("ph", "stp", "total_p", "caco3", "clay", "om", "base_saturation", "ca", "fe",
                   "al", "buffer_ph")

# Zone-table columns: key -> (header, unit, decimals; None = 3 significant figures).
_ZONE_COLUMNS: dict[str, tuple[str, str, int | None]] = {
    "zone_id": ("Zone", "", None),
    "class_id": ("Class", "", None),
    "class_label": ("Class label", "", None),
    "role": ("Role", "", None),
    "basis": ("Basis", "", None),
    "n_polygons": ("Polygons", "", None),
    "n_cells": ("Cells", "", None),
    "area_ha": ("Area", "ha", 2),
    "mean_stp_mg_kg": ("Mean soil-test P", "mg/kg", 1),
    "mean_rule_stp_mg_kg": ("Soil-test P for the rule", "mg/kg", 1),
    "mean_deficiency_probability": ("P(below critical)", "", 2),
    "p2o5_kg_ha": ("P2O5 rate", "kg/ha", 1),
    "min_p2o5_kg_ha": ("Least P2O5 rate", "kg/ha", 1),
    "max_p2o5_kg_ha": ("Largest P2O5 rate", "kg/ha", 1),
    "mean_p2o5_kg_ha": ("Mean P2O5 rate", "kg/ha", 1),
    "product": ("Product", "", None),
    "product_kg_ha": ("Product rate", "kg/ha", 1),
    "n_kg_ha": ("N with it", "kg/ha", 1),
    "p2o5_total_kg": ("P2O5 total", "kg", 0),
    "product_total_kg": ("Product total", "kg", 0),
    "n_total_kg": ("N total", "kg", 0),
    "area_without_rate_ha": ("Area without a rate", "ha", 2),
}


# ----------------------------------------------------------------------------- formatting

def _e(value: Any) -> str:
    """HTML-escaped text of ``value`` (quotes too, so it is safe in attributes)."""
    return html.escape(str(value), quote=True)


def _is_real(value: Any) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def _sig(value: float, sig: int = 3) -> str:
    """``value`` to about ``sig`` significant figures, thousands grouped."""
    a = abs(value)
    if a == 0:
        return "0"
    if a >= 10 ** sig:
        return f"{value:,.0f}"
    if a < 1e-3:
        return f"{value:.{sig - 1}e}"
    digits = max(0, sig - 1 - math.floor(math.log10(a)))
    return f"{value:.{digits}f}"


def _fmt(value: Any, decimals: int | None = None, unit: str = "") -> str:
    """Plain text of a summary value: numbers rounded for reading, with ``unit``."""
    if value is None:
        return _DASH
    if isinstance(value, bool):
        text = "yes" if value else "no"
    elif isinstance(value, numbers.Integral):
        text = f"{int(value):,}"
    elif _is_real(value):
        v = float(value)
        if not math.isfinite(v):
            return _DASH
        text = f"{v:,.{decimals}f}" if decimals is not None else _sig(v)
    elif isinstance(value, (list, tuple)):
        text = ", ".join(_fmt(v, decimals) for v in value) or _DASH
    elif isinstance(value, Mapping):
        text = "; ".join(f"{k}: {_fmt(v, decimals)}" for k, v in value.items()) or _DASH
    else:
        text = str(value) if str(value) != "" else _DASH
    return f"{text} {unit}" if unit and text != _DASH else text


def _g(value: Any) -> str:
    """A threshold or setting as given: shortest plain form (20, 0.5, 1e-05), lists joined."""
    if _is_real(value) and not isinstance(value, numbers.Integral):
        return f"{float(value):g}" if math.isfinite(float(value)) else _DASH
    if isinstance(value, (list, tuple)):
        return ", ".join(_g(v) for v in value) or _DASH
    if isinstance(value, Mapping):
        return "; ".join(f"{k}: {_g(v)}" for k, v in value.items()) or _DASH
    return _fmt(value)


def _h(value: Any, decimals: int | None = None, unit: str = "") -> str:
    """Escaped :func:`_fmt`."""
    return _e(_fmt(value, decimals, unit))


def _json_default(obj: Any) -> Any:
    if hasattr(obj, "tolist"):  # numpy scalars and arrays
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON-able: {type(obj).__name__}")


def _json_text(value: Any) -> str:
    """``value`` as JSON text (floats as Python's shortest round-trip repr)."""
    return json.dumps(value, default=_json_default, ensure_ascii=False, allow_nan=True)


def _get(mapping: Any, *keys: str, default: Any = None) -> Any:
    """``mapping[k1][k2]...`` or ``default`` when any level is missing or not a mapping."""
    node = mapping
    for key in keys:
        if not isinstance(node, Mapping) or key not in node:
            return default
        node = node[key]
    return node


def _href(path: str) -> str | None:
    """An escaped relative URL for a run file, or None for anything that is not plainly relative."""
    path = str(path)
    if (not path or path.startswith(("/", "\\")) or ":" in path.split("/", 1)[0]
            or ".." in Path(path).parts):
        return None
    return _e(urllib.parse.quote(path, safe="/"))


def _anchor(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", str(text).lower()).strip("-") or "x"


# ----------------------------------------------------------------------------- images

def _png_size(data: bytes) -> tuple[int, int] | None:
    """Width and height from a PNG's IHDR chunk."""
    if len(data) >= 24 and data[12:16] == b"IHDR":
        return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    return None


def _figure(path: Path, caption: str, link: str | None = None) -> str:
    """A ``<figure>`` with the PNG at ``path`` embedded, or a note when it is not a PNG."""
    try:
        data = path.read_bytes()
    except OSError as exc:
        return (f'<p class="note">{_e(link or path.name)}: could not be read '
                f"({_e(exc.strerror)}).</p>")
    if not data.startswith(_PNG_MAGIC):
        return f'<p class="note">{_e(link or path.name)}: not a PNG file, not shown.</p>'
    size = _png_size(data)
    dims = f' width="{size[0]}" height="{size[1]}"' if size else ""
    src = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
    file_note = ""
    if link:
        href = _href(link)
        name = f"<code>{_e(link)}</code>"
        shown = f'<a href="{href}">{name}</a>' if href else name
        file_note = f' <span class="muted">({shown})</span>'
    return (f'<figure><img src="{src}" alt="{_e(caption)}"{dims} loading="eager">'
            f"<figcaption>{_e(caption)}{file_note}</figcaption></figure>")


def _caption(outputs: Mapping[str, Any], rel: str, fallback: str) -> str:
    text = str(outputs.get(rel) or fallback)
    for prefix in ("review map of ",):
        if text.startswith(prefix):
            text = text[len(prefix):]
    return text[:1].upper() + text[1:]


def _pngs(folder: Path) -> list[Path]:
    return sorted(p for p in folder.glob("*.png") if p.is_file()) if folder.is_dir() else []


# ----------------------------------------------------------------------------- tables

def _cell(key: str, value: Any, *, decimals: int | None = None, unit: str = "",
          tag: str = "td") -> str:
    """A table cell showing ``value`` rounded, with ``data-key`` and the exact ``data-value``."""
    cls = ' class="num"' if _is_real(value) else ""
    return (f'<{tag}{cls} data-key="{_e(key)}" data-value="{_e(_json_text(value))}">'
            f"{_h(value, decimals, unit)}</{tag}>")


def _columns(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    """Every key of ``rows``: the known ones in pmap's order, then the rest as they come."""
    keys: list[str] = [k for k in _ZONE_COLUMNS if any(k in r for r in rows)]
    for row in rows:
        keys += [k for k in row if k not in keys]
    return keys


def _record_table(rows: Sequence[Mapping[str, Any]], table_id: str, caption: str,
                  row_key: str, row_attr: str, footer: str = "") -> str:
    """A table of records: one column per key, every cell with its exact ``data-value``."""
    keys = _columns(rows)
    head = "".join(
        f'<th scope="col">{_e(_ZONE_COLUMNS.get(k, (k, "", None))[0])}'
        + (f'<br><span class="muted">{_e(_ZONE_COLUMNS[k][1])}</span>'
           if k in _ZONE_COLUMNS and _ZONE_COLUMNS[k][1] else "")
        + "</th>" for k in keys)
    body = []
    for row in rows:
        cells = []
        for k in keys:
            if k in row:
                cells.append(_cell(k, row[k], decimals=_ZONE_COLUMNS.get(k, ("", "", None))[2]))
            else:
                cells.append("<td></td>")
        body.append(f'<tr {row_attr}="{_e(_json_text(row.get(row_key)))}">{"".join(cells)}</tr>')
    return (f'<div class="wide"><table id="{_e(table_id)}"><caption>{_e(caption)}</caption>'
            f"<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody>{footer}</table></div>")


def _kv_table(rows: Iterable[tuple[str, str]], table_id: str | None = None, caption: str = "",
              headers: tuple[str, ...] = ()) -> str:
    """A two-or-more-column table of already escaped cells."""
    attr = f' id="{_e(table_id)}"' if table_id else ""
    cap = f"<caption>{_e(caption)}</caption>" if caption else ""
    head = ("<thead><tr>" + "".join(f'<th scope="col">{_e(h)}</th>' for h in headers)
            + "</tr></thead>") if headers else ""
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>" for row in rows)
    if not body:
        return ""
    return f'<div class="wide"><table{attr}>{cap}{head}<tbody>{body}</tbody></table></div>'


def _config_table(section: Mapping[str, Any] | None, caption: str) -> str:
    if not isinstance(section, Mapping) or not section:
        return ""
    rows = [(f"<code>{_e(k)}</code>", _e(_g(v))) for k, v in section.items()]
    return _kv_table(rows, caption=caption, headers=("Setting", "Value"))


def _section(anchor: str, title: str, body: str, *, major: bool = True) -> str:
    cls = ' class="major"' if major else ""
    return f'<section id="{_e(anchor)}"{cls}><h2>{_e(title)}</h2>{body}</section>'


# ----------------------------------------------------------------------------- sections

def _basis_sentence(summary: Mapping[str, Any]) -> str:
    """What the rates rest on, in one sentence."""
    presc = summary.get("prescription") or {}
    interp = presc.get("interpretation") or {}
    driver = summary.get("soil_test_p_driving_rates") or {}
    parts = [f"Rates rest on the {presc.get('basis') or 'soil test'}"]
    if driver.get("description"):
        parts[0] += f" ({driver['description']})"
    if interp:
        parts.append(
            f", classed by the {interp.get('region', '?')} {interp.get('method', '')} table for "
            f"{interp.get('crop', '?')} (critical {_g(interp.get('critical_ppm'))} mg/kg, limit "
            f"{_g(interp.get('limit_ppm'))} mg/kg)")
    if presc.get("zones_by"):
        parts.append(f", zones by {presc['zones_by']}")
    if presc.get("product"):
        parts.append(f"; product {presc['product']}")
    text = "".join(parts) + "."
    for extra in (presc.get("single_rate_notice"), driver.get("risk_aware_rule")):
        if extra:
            text += f" {str(extra).rstrip('.')}."
    return text


def _header(summary: Mapping[str, Any], n_warnings: int) -> str:
    field = summary.get("field") or {}
    name = field.get("name") or "(unnamed field)"
    grid = summary.get("grid") or {}
    inputs = summary.get("inputs") or {}
    facts = [
        ("Farm", field.get("farm")),
        ("Sampling date", field.get("sampling_date")),
        ("Sampling depth", f"{field['sampling_depth_cm']} cm" if field.get("sampling_depth_cm")
         else None),
        ("Area", _fmt(grid.get("area_ha"), 2, "ha") if grid.get("area_ha") is not None else None),
        ("Samples used", _fmt(inputs.get("n_samples_used")) if inputs.get("n_samples_used")
         is not None else None),
        ("Soil-test P method", inputs.get("soil_test_p_method")),
        ("CRS", summary.get("crs")),
        ("pmap version", summary.get("pmap_version")),
    ]
    dl = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in facts if v not in (None, ""))
    warn = (f'<p><a href="#warnings">{n_warnings} warning{"s" if n_warnings != 1 else ""}</a> '
            "about the data and the run: read them before using the rates.</p>"
            if n_warnings else "")
    return (f'<header id="top"><p class="muted">pmap field report</p><h1>{_e(name)}</h1>'
            f'<p class="basis">{_e(_basis_sentence(summary))}</p>'
            f'<dl class="facts">{dl}</dl>{warn}</header>')


def _cautions(summary: Mapping[str, Any]) -> str:
    text = summary.get("cautions")
    if not text:
        from pmap.cautions import CAUTIONS

        text = CAUTIONS
    paras = "".join(f"<p>{_e(p)}</p>" for p in str(text).split("\n") if p.strip())
    return (f'<section id="cautions" class="cautions" role="note"><h2>Read before use</h2>'
            f"{paras}</section>")


def _toc(entries: Sequence[tuple[str, str]]) -> str:
    items = "".join(f'<li><a href="#{_e(a)}">{_e(t)}</a></li>' for a, t in entries)
    return f'<nav class="toc" aria-label="Contents"><h2>Contents</h2><ol>{items}</ol></nav>'


def _rates(summary: Mapping[str, Any]) -> str:
    polygons = [r for r in summary.get("rate_polygons") or [] if isinstance(r, Mapping)]
    classes = [r for r in summary.get("zones") or [] if isinstance(r, Mapping)]
    totals = summary.get("totals") or {}
    presc = summary.get("prescription") or {}
    out = []
    coverage = presc.get("coverage") or {}
    if coverage:
        out.append(
            f"<p>Rates are given within {_h(coverage.get('max_distance_from_sample_m'), 0, 'm')} "
            f"of a sample ({_e(coverage.get('rule', ''))}; sample spacing "
            f"{_h(coverage.get('sample_spacing_m'), 0, 'm')}); "
            f"{_h(coverage.get('area_without_rate_ha'), 2, 'ha')} of the field have no rate.</p>")
    if polygons:
        foot_cells = []
        keys = _columns(polygons)
        total_for = {"area_ha": "area_ha", "p2o5_total_kg": "p2o5_total_kg",
                     "product_total_kg": "product_total_kg", "n_total_kg": "n_total_kg",
                     "p2o5_kg_ha": "mean_p2o5_kg_ha", "product": "product"}
        for i, k in enumerate(keys):
            tk = total_for.get(k)
            if i == 0:
                foot_cells.append('<th scope="row">Field</th>')
            elif tk and tk in totals:
                foot_cells.append(_cell(f"totals.{tk}", totals[tk],
                                        decimals=_ZONE_COLUMNS.get(tk, ("", "", None))[2]))
            else:
                foot_cells.append("<td></td>")
        footer = f"<tfoot><tr>{''.join(foot_cells)}</tr></tfoot>" if totals else ""
        out.append("<h3>Rate zones</h3>")
        out.append(_record_table(polygons, "rate-zones",
                                 "One row per rate polygon, each with the one rate it carries "
                                 "(the field row holds the totals; its P2O5 rate is the "
                                 "area-weighted mean).", "zone_id", "data-zone-id", footer))
    else:
        out.append('<p class="note">The summary holds no rate polygons.</p>')
    if classes:
        out.append("<h3>Zone classes</h3>")
        out.append(_record_table(classes, "rate-classes",
                                 "Per soil-test class, summed over its polygons.",
                                 "class_id", "data-class-id"))
    if totals:
        rows = "".join(
            f'<tr><th scope="row">{_e(_ZONE_COLUMNS.get(k, (k, "", None))[0])}</th>'
            + _cell(k, v, decimals=_ZONE_COLUMNS.get(k, ("", "", None))[2],
                    unit=_ZONE_COLUMNS.get(k, ("", "", None))[1]) + "</tr>"
            for k, v in totals.items())
        out.append(f'<h3>Field totals</h3><table id="field-totals"><tbody>{rows}</tbody></table>')
    grade = presc.get("product_grade_n_p2o5_k2o")
    if grade:
        out.append(f"<p>Product grade (N-P2O5-K2O): {_e('-'.join(_g(g) for g in grade))}. "
                   f"Rate rule units: {_e(_get(summary, 'rate_rule', 'units', default='metric'))}; "
                   "every rate in this report is per hectare and every total in kg.</p>")
    return "".join(out)


def _map_group(name: str, properties: Mapping[str, Any]) -> str:
    """The anchor of the group a map belongs to."""
    if name in _PRESCRIPTION_MAPS:
        return "maps-prescription"
    if name.endswith(("_variance", "_sd", "_probability")):
        return "maps-uncertainty"
    if name in _SOIL_MODEL_MAPS:
        return "maps-soil-model"
    if name in _LIME_ENV_MAPS:
        return "maps-lime-environment"
    if name in properties or name in _SOIL_TEST_MAPS:
        return "maps-soil-tests"
    return "maps-other"


def _order_key(order: Sequence[str], name: str) -> tuple[int, str]:
    return (order.index(name) if name in order else len(order), name)


def _maps(run_dir: Path, summary: Mapping[str, Any],
          skip: set[str]) -> tuple[str, list[tuple[str, str]]]:
    """The maps section and its sub-headings (for the contents)."""
    outputs = summary.get("outputs") or {}
    properties = summary.get("properties") or {}
    run_order = [k[len("maps/"):-len(".png")] for k in outputs
                 if k.startswith("maps/") and k.endswith(".png")]
    groups: dict[str, list[Path]] = {g[0]: [] for g in _GROUPS}
    for png in _pngs(run_dir / "maps"):
        if png.stem in skip:
            continue
        groups[_map_group(png.stem, properties)].append(png)
    out, subs = [], []
    for anchor, title, note in _GROUPS:
        pngs = groups[anchor]
        if not pngs:
            continue
        order = list(_PRESCRIPTION_MAPS) if anchor == "maps-prescription" else run_order
        pngs.sort(key=lambda p: _order_key(order, p.stem))
        figs = "".join(_figure(p, _caption(outputs, f"maps/{p.name}", p.stem.replace("_", " ")),
                               f"maps/{p.name}") for p in pngs)
        out.append(f'<h3 id="{anchor}">{_e(title)}</h3>'
                   + (f'<p class="note">{_e(note)}</p>' if note else "")
                   + f'<div class="figures">{figs}</div>')
        subs.append((anchor, title))
    if not out:
        out.append('<p class="note">No maps were found in maps/.</p>')
    return "".join(out), subs


def _diagnostic_owner(stem: str, names: Iterable[str]) -> str | None:
    """The property a diagnostics PNG is about: the longest name among its ``_`` tokens."""
    tokens = f"_{stem}_"
    hits = [n for n in names if f"_{n}_" in tokens]
    return max(hits, key=len) if hits else None


def _model_row(name: str, prop: Mapping[str, Any]) -> tuple[str, ...]:
    model = prop.get("model") or {}
    cv = prop.get("cv") or {}
    kf = prop.get("k_fold") or {}
    space = "log" if prop.get("log") else "value"
    unit = prop.get("unit", "")
    return (f"<code>{_e(name)}</code>", _e(unit), _h(prop.get("n_samples")),
            _e(f"{model.get('kind', _DASH)} ({space})"),
            _h(model.get("nugget")), _h(model.get("psill")), _h(model.get("range_m"), 0, "m"),
            _h(cv.get("rmse")), _h(cv.get("mean_error")), _h(cv.get("msdr"), 2),
            _h(kf.get("rmse")), _h(kf.get("msdr"), 2),
            _e(" / ".join(_fmt(prop.get(k)) for k in ("map_min", "map_mean", "map_max"))))


def _candidates_table(prop: Mapping[str, Any]) -> str:
    rows = []
    for cand in prop.get("candidates") or []:
        loo = cand.get("loo") or {}
        model = cand.get("model") or {}
        cls = ' class="chosen"' if cand.get("chosen") else ""
        note = cand.get("skipped") or ("chosen" if cand.get("chosen") else "")
        rows.append(
            f"<tr{cls}><td>{_e(cand.get('label', ''))}</td>"
            f"<td>{'log' if cand.get('log') else 'value'}</td>"
            f'<td class="num">{_h(model.get("range_m"), 0)}</td>'
            f'<td class="num">{_h(cand.get("wsse"))}</td>'
            f'<td class="num">{_h(loo.get("rmse"))}</td>'
            f'<td class="num">{_h(loo.get("mean_error"))}</td>'
            f'<td class="num">{_h(loo.get("msdr"), 2)}</td><td>{_e(note)}</td></tr>')
    if not rows:
        return ""
    head = "".join(f'<th scope="col">{h}</th>' for h in (
        "Candidate", "Space", "Range (m)", "Fit WSSE", "LOO RMSE", "LOO mean error", "LOO MSDR",
        ""))
    selection = _e(prop.get("selection", ""))
    return (f'<div class="wide"><table><caption>Variogram candidates ({selection})</caption>'
            f"<thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table></div>")


def _calibration_block(cal: Mapping[str, Any]) -> str:
    if not isinstance(cal, Mapping) or not cal:
        return ""
    stats = [("Status", _h(cal.get("status"))), ("Method", _h(cal.get("method"))),
             ("Source", _h(cal.get("source"))), ("Fit", _h(cal.get("fit"))),
             ("Lab pairs", _h(cal.get("n_pairs")))]
    for label, key in (("RMSE", "rmse_mg_kg"), ("Bias", "bias_mg_kg"),
                       ("Cross-validated RMSE", "cv_rmse_mg_kg"),
                       ("Cross-validated bias", "cv_bias_mg_kg"),
                       ("RMSE with the default parameters", "default_rmse_mg_kg"),
                       ("Bias with the default parameters", "default_bias_mg_kg")):
        if key in cal:
            stats.append((label, _h(cal[key], 2, "mg/kg")))
    for label, key in (("R\u00b2", "r2"), ("Cross-validated R\u00b2", "cv_r2"),
                       ("R\u00b2 with the default parameters", "default_r2")):
        if key in cal:
            stats.append((label, _h(cal[key], 3)))
    below = cal.get("samples_below_critical")
    if isinstance(below, Mapping):
        stats.append(("Samples below the critical level "
                      f"({_g(below.get('critical_ppm'))} mg/kg)",
                      _e(f"lab {_fmt(below.get('lab'))}, default model "
                         f"{_fmt(below.get('default_model'))}, calibrated model "
                         f"{_fmt(below.get('calibrated_model'))}")))
    out = [_kv_table([(_e(k), v) for k, v in stats if v != _DASH], table_id="calibration-record",
                     caption="Calibration record", headers=("Item", "Value"))]
    estimates = cal.get("estimates") or {}
    if estimates:
        rows = []
        for name, value in estimates.items():
            ci = (cal.get("ci95") or {}).get(name)
            rows.append((f"<code>{_e(name)}</code>", _h(value), _h((cal.get("std_errors") or {})
                                                                 .get(name)),
                         _e(f"{_fmt(ci[0])} to {_fmt(ci[1])}") if ci else _DASH,
                         _e(_g((cal.get("start_values") or {}).get(name))),
                         _e(_g((cal.get("bounds") or {}).get(name)))))
        out.append(_kv_table(rows, caption="Fitted soil-model parameters",
                             headers=("Parameter", "Estimate", "Standard error", "95 % interval",
                                      "Start value", "Bounds")))
    if cal.get("held"):
        out.append(f"<p>Held at their configured values: {_h(cal['held'])}.</p>")
    for note in cal.get("notes") or []:
        out.append(f'<p class="note">{_e(note)}</p>')
    return "".join(out)


def _diagnostics(run_dir: Path, summary: Mapping[str, Any]) -> tuple[str, set[str]]:
    """The diagnostics section and the map stems it shows (so the maps section skips them)."""
    outputs = summary.get("outputs") or {}
    properties = {k: v for k, v in (summary.get("properties") or {}).items()
                  if isinstance(v, Mapping)}
    maps_dir = run_dir / "maps"
    shown: set[str] = set()
    extra = _pngs(run_dir / "diagnostics")
    by_prop: dict[str, list[Path]] = {}
    loose: list[Path] = []
    for png in extra:
        owner = _diagnostic_owner(png.stem, properties)
        (by_prop.setdefault(owner, []) if owner else loose).append(png)
    out = []
    if properties:
        head = ("Property", "Unit", "Samples", "Model", "Nugget", "Partial sill", "Range",
                "LOO RMSE", "LOO mean error", "LOO MSDR", "k-fold RMSE", "k-fold MSDR",
                "Map min / mean / max")
        out.append(_kv_table([_model_row(n, p) for n, p in properties.items()],
                             table_id="kriging-summary",
                             caption="Variogram model and cross-validation per property "
                             "(nugget and sill in the kriged space: log units where the space is "
                             "log; RMSE and mean error in the property's unit; an MSDR near 1 "
                             "means the kriging variance matches the actual errors)",
                             headers=head))
    for name, prop in properties.items():
        figs = []
        vario = maps_dir / f"variogram_{name}.png"
        if vario.is_file():
            shown.add(vario.stem)
            figs.append(_figure(vario, _caption(outputs, f"maps/{vario.name}",
                                                f"variogram of {name}"), f"maps/{vario.name}"))
        for png in by_prop.get(name, []):
            rel = f"diagnostics/{png.name}"
            figs.append(_figure(png, _caption(outputs, rel, png.stem.replace("_", " ")), rel))
        notes = "".join(f'<p class="note">{_e(n)}</p>' for n in prop.get("notes") or [])
        outliers = prop.get("outliers") or []
        if outliers:
            notes += (f"<p>{len(outliers)} sample(s) flagged as outliers: "
                      + _e("; ".join(_fmt(o) for o in outliers)) + "</p>")
        neighbourhood = prop.get("neighbourhood") or {}
        nb = (f"<p>Neighbourhood: {_e(neighbourhood.get('kind', ''))}"
              f"{' - ' + _e(neighbourhood['reason']) if neighbourhood.get('reason') else ''}</p>"
              if neighbourhood else "")
        out.append(f'<h3 id="diag-{_anchor(name)}">{_e(name)} ({_e(prop.get("kind", ""))}, '
                   f'{_e(prop.get("unit", ""))})</h3>'
                   f'<div class="figures diag">{"".join(figs)}</div>{nb}{notes}'
                   f"{_candidates_table(prop)}")
    cal_png = maps_dir / "calibration.png"
    cal = _get(summary, "soil_model", "calibration", default={})
    if cal_png.is_file() or cal:
        out.append('<h3 id="diag-calibration">Soil-model calibration</h3>')
        if cal_png.is_file():
            shown.add(cal_png.stem)
            out.append('<div class="figures single">' + _figure(
                cal_png, _caption(outputs, "maps/calibration.png", "calibration"),
                "maps/calibration.png") + "</div>")
        out.append(_calibration_block(cal))
    if loose:
        figs = "".join(
            _figure(p, _caption(outputs, f"diagnostics/{p.name}", p.stem.replace("_", " ")),
                    f"diagnostics/{p.name}") for p in loose)
        out.append('<h3 id="diag-other">Further diagnostics</h3>'
                   f'<div class="figures diag">{figs}</div>')
    if not out:
        out.append('<p class="note">No diagnostics were recorded.</p>')
    return "".join(out), shown


def _config_defaults() -> dict[str, Any]:
    try:
        from pmap.config import FieldConfig

        return FieldConfig().as_dict()
    except Exception:  # noqa: BLE001 - the report must not fail over a label
        return {}


def _parameters(summary: Mapping[str, Any]) -> str:
    config = summary.get("config") or {}
    defaults = _config_defaults()
    soil_model = summary.get("soil_model") or {}
    cal = soil_model.get("calibration") or {}
    estimates = (cal.get("estimates") or {}) if cal.get("status") == "calibrated" else {}
    config_file = _get(summary, "inputs", "config")
    out = []

    def source(section: str, key: str, value: Any) -> str:
        if key in estimates and section == "soil":
            return f"calibrated ({cal.get('source', 'this run')})"
        default = _get(defaults, section, key, default=object())
        if default == value:
            return "pmap default"
        return f"configuration ({config_file})" if config_file else "configuration"

    soil = config.get("soil") or {}
    if soil:
        rows = []
        for key, value in soil.items():
            used = estimates.get(key, value)
            rows.append((f"<code>{_e(key)}</code>", _h(used) if key in estimates else _e(_g(used)),
                         _e(_g(value)) if key in estimates else "",
                         _e(source("soil", key, value))))
        out.append("<h3>Soil model</h3>")
        out.append(f"<p>Fixation model: {_h(soil_model.get('fixation_model'))}; pH read as: "
                   f"{_h(soil_model.get('ph_kind'))}.</p>")
        out.append(_kv_table(rows, table_id="soil-parameters",
                             caption="Soil-model parameters used by this run",
                             headers=("Parameter", "Value used", "Configured value", "Source")))
    if cal:
        out.append(f"<p>Calibration: {_h(cal.get('status'))}"
                   + (f" from {_e(cal['source'])}" if cal.get("source") else "")
                   + ' (record under <a href="#diag-calibration">Diagnostics</a>).</p>')
    results = [(k, v) for k, v in soil_model.items() if k.startswith("mean_") and _is_real(v)]
    if results:
        out.append(_kv_table([(_e(k.removeprefix("mean_").removesuffix("_mg_kg").replace("_", " ")),
                               _h(v, 1, "mg/kg")) for k, v in results],
                             caption="Field means of the soil model",
                             headers=("Pool", "Mean")))
    if soil_model.get("note"):
        out.append(f'<p class="note">{_e(soil_model["note"])}</p>')
    uncertainty = soil_model.get("uncertainty") or {}
    if uncertainty.get("source"):
        out.append(f"<p>Uncertainty of the soil model: {_e(uncertainty['source'])}.</p>")
    lime = soil_model.get("lime") or {}
    if lime:
        out.append("<h3>Lime</h3><p>"
                   + _e(f"Method {lime.get('method', _DASH)}, target pH "
                        f"{_g(lime.get('target_ph'))}; "
                        f"{_fmt(lime.get('area_below_target_ha'), 2, 'ha')} below the target; "
                        f"{_fmt(lime.get('total_t'), 1, 't')} in all.")
                   + "</p>")
        classes = lime.get("classes") or []
        if classes:
            out.append(_kv_table([(_h(c.get("label")), _h(c.get("rate_t_ha"), 1, "t/ha"),
                                   _h(c.get("area_ha"), 2, "ha")) for c in classes],
                                 caption="Lime-rate classes",
                                 headers=("Class", "Rate", "Area")))
    low = soil_model.get("low_ph") or {}
    if low:
        out.append(f"<p>{_h(low.get('area_below_ha'), 2, 'ha')} below the pH floor of "
                   f"{_e(_g(low.get('ph_floor')))} for P rates.</p>")
    fixation = summary.get("fixation") or {}
    if fixation:
        rows = [(_e(f"{kind}: {label}"), _h(area, 2, "ha"))
                for kind, key in (("mechanism", "mechanism_area_ha"), ("class", "class_area_ha"))
                for label, area in (fixation.get(key) or {}).items()]
        out.append("<h3>Fixation</h3>"
                   f"<p>Mean fixation-risk index {_h(fixation.get('mean_index'), 2)} (0-1).</p>"
                   + _kv_table(rows, caption="Area by fixation mechanism and risk class",
                               headers=("Mechanism or class", "Area")))
    rule = summary.get("rate_rule") or {}
    interp = _get(summary, "prescription", "interpretation", default={}) or {}
    if rule:
        out.append("<h3>Rate rule</h3>")
        if interp.get("source"):
            out.append(f"<p>Interpretation table: {_e(interp['source'])}.</p>")
        if interp.get("labels"):
            breaks = [_fmt(b) for b in interp.get("breaks_mg_kg") or []]
            out.append(f"<p>Classes: {_e(', '.join(interp['labels']))}; breaks at "
                       f"{_e(', '.join(breaks) or _DASH)} mg/kg.</p>")
        out.append(_config_table(rule, "Rate-rule settings as used"))
    kriging = config.get("kriging") or {}
    if kriging:
        out.append("<h3>Kriging</h3>")
        out.append('<p>Fitted variogram models per property are under '
                   '<a href="#diagnostics">Diagnostics</a>.</p>')
        out.append(_config_table(kriging, "Kriging settings ([kriging])"))
    grid = summary.get("grid") or {}
    wcrs = summary.get("working_crs") or {}
    if grid:
        out.append("<h3>Grid</h3><p>" + _e(
            f"{_g(grid.get('cell_size_m'))} m cells, {_fmt(grid.get('width'))} x "
            f"{_fmt(grid.get('height'))}, {_fmt(grid.get('cells_inside'))} inside the field; "
            f"CRS {summary.get('crs', _DASH)}.") + (f" {_e(wcrs['reason'])}." if wcrs.get("reason")
                                                   else "") + "</p>")
    other = [(s, config.get(s)) for s in ("fixation", "lime", "environment", "zones", "clusters",
                                          "soil_test_equivalent")]
    tables = "".join(_config_table(v, f"[{s}]") for s, v in other if v)
    if tables:
        out.append(f"<h3>Other settings</h3>{tables}")
    return "".join(out) or '<p class="note">The summary records no parameters.</p>'


def _warnings(summary: Mapping[str, Any]) -> tuple[str, int]:
    inputs = summary.get("inputs") or {}
    ingest = [str(n) for n in inputs.get("notes") or []]
    ingest += [str(n) for n in _get(summary, "soil_model", "input_notes", default=[]) or []]
    run = [str(w) for w in summary.get("warnings") or []]
    out = []
    read, used = inputs.get("n_samples_read"), inputs.get("n_samples_used")
    if read is not None or used is not None:
        out.append(f"<p>Samples read: {_h(read)}; used: {_h(used)}.</p>")
    left = inputs.get("samples_left_out_outside_boundary") or []
    if left:
        out.append(f"<p>{len(left)} sample(s) left out as outside the boundary: "
                   f"{_e(', '.join(str(x) for x in left))}.</p>")
    for title, list_id, lines, none in (
            ("From the run", "run-warnings", run, "The run raised no warnings."),
            ("From reading the inputs", "input-notes", ingest, "No notes from reading the inputs."),
    ):
        items = "".join(f"<li>{_e(line)}</li>" for line in lines)
        out.append(f"<h3>{_e(title)}</h3>" + (f'<ul class="warnings" id="{list_id}">{items}</ul>'
                                               if lines else f'<p class="note">{_e(none)}</p>'))
    return "".join(out), len(run)


def _outputs(summary: Mapping[str, Any]) -> str:
    outputs = summary.get("outputs") or {}
    rows = []
    for rel, text in outputs.items():
        href = _href(rel)
        name = f"<code>{_e(rel)}</code>"
        rows.append((f'<a href="{href}">{name}</a>' if href else name, _e(text)))
    if not rows:
        return '<p class="note">The summary lists no output files.</p>'
    return ("<p>Links are relative to this report, which sits in the run's output directory.</p>"
            + _kv_table(rows, table_id="output-files", headers=("File", "What it holds")))


def _page(title: str, body: str) -> str:
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f'<meta http-equiv="Content-Security-Policy" content="{_e(_CSP)}">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            '<meta name="referrer" content="no-referrer">'
            f'<meta name="generator" content="pmap">'
            f"<title>{_e(title)}</title><style>{_CSS}</style></head>"
            f"<body>{body}</body></html>\n")


# ----------------------------------------------------------------------------- public API

def render_field_report(run_dir: Path, summary: Mapping[str, Any]) -> str:
    """The HTML text of the field report for ``run_dir`` (see :func:`write_field_report`)."""
    run_dir = Path(run_dir)
    diagnostics, shown = _diagnostics(run_dir, summary)
    maps, map_groups = _maps(run_dir, summary, shown)
    warnings_html, n_warnings = _warnings(summary)
    outputs = summary.get("outputs") or {}
    overview = run_dir / "overview.png"
    parts = [_header(summary, n_warnings), _cautions(summary)]
    toc = [("rates", "Rates and zones"), ("maps", "Maps"), ("diagnostics", "Diagnostics"),
           ("parameters", "Model parameters and sources"), ("warnings", "Data-quality warnings"),
           ("files", "Output files")]
    if overview.is_file():
        toc.insert(0, ("overview", "Overview"))
    parts.append(_toc(toc))
    if overview.is_file():
        parts.append(_section("overview", "Overview", '<div class="figures single">'
                              + _figure(overview, _caption(outputs, "overview.png",
                                                           "overview of the field"),
                                        "overview.png") + "</div>", major=False))
    parts.append(_section("rates", "Rates and zones", _rates(summary)))
    contents = "".join(f'<li><a href="#{a}">{_e(t)}</a></li>' for a, t in map_groups)
    parts.append(_section("maps", "Maps", (f"<ul>{contents}</ul>" if contents else "") + maps))
    parts.append(_section("diagnostics", "Diagnostics", diagnostics))
    parts.append(_section("parameters", "Model parameters and sources", _parameters(summary)))
    parts.append(_section("warnings", "Data-quality warnings", warnings_html))
    parts.append(_section("files", "Output files", _outputs(summary)))
    parts.append(f'<footer><p class="muted">Written by pmap {_h(summary.get("pmap_version"))} '
                 "from summary.json and the maps of this run.</p></footer>")
    field = summary.get("field") or {}
    title = " - ".join(str(x) for x in (field.get("name") or "field", field.get("farm"),
                                         field.get("sampling_date")) if x)
    return _page(f"pmap report: {title}", "".join(parts))


def write_field_report(run_dir: Path, summary: dict, *, path: Path | None = None) -> Path:
    """Write the self-contained HTML report of the run in ``run_dir``; return its path.

    ``summary`` is the dict written to ``summary.json`` (JSON-safe values).  Pictures come
    from ``run_dir/maps/*.png`` and, when present, ``run_dir/overview.png`` and
    ``run_dir/diagnostics/*.png``.  The report goes to ``path`` (default
    ``run_dir/report.html``), written as UTF-8.
    """
    run_dir = Path(run_dir)
    target = Path(path) if path is not None else run_dir / REPORT_NAME
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(render_field_report(run_dir, summary), encoding="utf-8")
    return target


def _figure_cells(summary: Mapping[str, Any] | None) -> list[str]:
    """Key figures of one field for the batch index (escaped cells)."""
    s = summary or {}
    totals = s.get("totals") or {}
    product = totals.get("product") or _get(s, "prescription", "product")
    values = [
        ("n_samples_used", _get(s, "inputs", "n_samples_used"), None, ""),
        ("area_ha", totals.get("area_ha", _get(s, "grid", "area_ha")), 2, ""),
        ("mean_available_p_mg_kg", _get(s, "soil_model", "mean_available_p_mg_kg"), 1, ""),
        ("p2o5_total_kg", totals.get("p2o5_total_kg"), 0, ""),
        ("product_total_kg", totals.get("product_total_kg"), 0, ""),
    ]
    cells = [_cell(k, v, decimals=d) if v is not None else "<td></td>" for k, v, d, _ in values]
    cells.append(f"<td>{_e(product) if product else ''}</td>")
    return cells


def render_batch_index(fields: Sequence[Mapping[str, Any]], title: str = "pmap batch") -> str:
    """The HTML text of a batch index (see :func:`write_batch_index`)."""
    counts: dict[str, int] = {}
    rows = []
    for f in fields:
        status = str(f.get("status") or "ok")
        counts[status] = counts.get(status, 0) + 1
        name = str(f.get("name") or "(unnamed)")
        report = f.get("report")
        href = _href(str(report)) if report else None
        name_html = f'<a href="{href}">{_e(name)}</a>' if href else _e(name)
        error = f.get("error")
        err = f'<span class="error">{_e(error)}</span>' if error else ""
        cls = f"status-{_anchor(status)}"
        rows.append(f'<tr data-field="{_e(name)}" data-status="{_e(status)}"><td>{name_html}</td>'
                    f'<td class="{cls}">{_e(status)}</td><td>{err}</td>'
                    + "".join(_figure_cells(f.get("summary"))) + "</tr>")
    head = "".join(f'<th scope="col">{h}</th>' for h in (
        "Field", "Status", "Error", "Samples", "Area (ha)", "Mean available P (mg/kg)",
        "P2O5 total (kg)", "Product total (kg)", "Product"))
    tally = ", ".join(f"{n} {s}" for s, n in counts.items()) or "no fields"
    from pmap.cautions import CAUTIONS_SHORT

    body = (f'<header><p class="muted">pmap batch index</p><h1>{_e(title)}</h1>'
            f"<p>{len(fields)} field{'s' if len(fields) != 1 else ''}: {_e(tally)}.</p></header>"
            f'<section class="cautions" role="note"><p>{_e(CAUTIONS_SHORT)}</p></section>'
            f'<div class="wide"><table id="batch-fields"><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table></div>")
    return _page(title, body)


def write_batch_index(out_dir: Path, fields: Sequence[Mapping]) -> Path:
    """Write ``out_dir/index.html``: one row per field, linking its report; return the path.

    Each mapping holds ``name``, ``report`` (path of its report.html relative to
    ``out_dir``, or None), ``status`` ("ok", "failed" or "skipped"), ``error`` (text or
    None) and ``summary`` (the field's summary dict, or None); key figures come from it.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    target = out_dir / INDEX_NAME
    target.write_text(render_batch_index(fields), encoding="utf-8")
    return target
