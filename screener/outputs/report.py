"""The run report: one self-contained HTML file.

Figures are embedded as base64 PNG, the style sheet is inline, and there is no
JavaScript and no external asset, so the file can be mailed, archived or opened
offline.  Every piece of user text (taxon names, file names, reasons, settings) is
escaped with :func:`html.escape`.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import json
import logging
import math

import numpy as np

from screener.outputs import maps
from screener.outputs.cautions import cautions_html
from screener.outputs.privacy import FULL_PRECISION_MARKER, has_full_precision_sensitive

__all__ = ["render_report", "html_table"]

log = logging.getLogger(__name__)

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#222;
max-width:1100px;margin:2em auto;padding:0 1.5em;line-height:1.45;background:#fff}
h1{font-size:1.6em;border-bottom:2px solid #222;padding-bottom:.2em}
h2{font-size:1.25em;margin-top:2em;border-bottom:1px solid #bbb}
h3{font-size:1.05em;margin-top:1.4em}
table{border-collapse:collapse;font-size:.85em;margin:.6em 0 1.2em}
th,td{border:1px solid #ccc;padding:.25em .5em;text-align:left;vertical-align:top}
th{background:#f0f0f0}
td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:1em 0}figure img{max-width:100%;border:1px solid #ddd}
figcaption{font-size:.85em;color:#444}
.marker{border:2px solid #000;padding:.3em .6em;font-weight:bold;display:inline-block}
.note{color:#444;font-size:.9em}
dl.cautions dt{font-weight:bold;margin-top:.6em}dl.cautions dd{margin-left:1em}
nav a{margin-right:1em}
"""


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _cell(value) -> str:
    if isinstance(value, (bool, np.bool_)):
        return f"<td>{'yes' if value else 'no'}</td>"
    if isinstance(value, (int, np.integer)):
        return f'<td class="num">{int(value)}</td>'
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return '<td class="num">n/a</td>'
        txt = (
            f"{v:,.1f}"
            if abs(v) >= 100
            else f"{v:.3g}"
            if abs(v) < 0.01 and v
            else f"{v:.3f}"
        )
        return f'<td class="num">{txt}</td>'
    return f"<td>{_e(value)}</td>"


def html_table(rows, columns=None, *, caption: str | None = None) -> str:
    """An HTML table from a list of dicts (or a DataFrame), values escaped."""
    if hasattr(rows, "to_dict"):
        if columns is None:
            columns = [str(c) for c in rows.columns]
        rows = rows.to_dict("records")
    rows = list(rows)
    if columns is None:
        columns = []
        for r in rows:
            columns += [k for k in r if k not in columns]
    if not rows:
        return '<p class="note">None.</p>'
    out = ["<table>"]
    if caption:
        out.append(f"<caption>{_e(caption)}</caption>")
    out.append(
        "<thead><tr>"
        + "".join(f"<th>{_e(c)}</th>" for c in columns)
        + "</tr></thead><tbody>"
    )
    for r in rows:
        out.append("<tr>" + "".join(_cell(r.get(c, "")) for c in columns) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def _figure(fig_or_ax, caption: str, alt: str) -> str:
    fig = getattr(fig_or_ax, "figure", fig_or_ax)
    data = base64.b64encode(maps.figure_to_png_bytes(fig)).decode("ascii")
    return (
        f'<figure><img alt="{_e(alt)}" src="data:image/png;base64,{data}">'
        f"<figcaption>{_e(caption)}</figcaption></figure>"
    )


def _safe_figure(make, caption, alt):
    try:
        return _figure(make(), caption, alt)
    except Exception as exc:  # a figure must not sink the whole report
        log.warning("figure %r failed: %s", alt, exc)
        return f'<p class="note">Figure "{_e(alt)}" could not be drawn: {_e(exc)}</p>'


def _inputs(result) -> str:
    g = result.grid
    crs = g.pyproj_crs
    unit = "degrees" if g.is_geographic else "CRS units"
    rows = [
        {"item": "grid CRS", "value": f"{crs.name} ({crs.to_string()})"},
        {"item": "grid shape (rows x cols)", "value": f"{g.n_rows} x {g.n_cols}"},
        {"item": "cell size", "value": f"{g.res[0]:g} x {g.res[1]:g} {unit}"},
        {"item": "valid cells", "value": f"{g.n_valid:,}"},
        {
            "item": "environmental layers",
            "value": ", ".join(map(str, result.layer_names)),
        },
    ]
    aligned = [o for o in (result.provenance or {}).get("layers", [])
               if o.get("method") != "none"]
    if aligned:
        rows.append({
            "item": "layers aligned to the grid",
            "value": "; ".join(
                f"{o['name']} ({o['crs']}, cells {o['res'][0]:.6g} x {o['res'][1]:.6g}): "
                f"{o['method']}" + (f", {o['note']}" if o.get("note") else "")
                for o in aligned),
        })
    out = [html_table(rows, ["item", "value"])]
    recs = [
        {
            "taxon": n,
            "records kept": t.records.n,
            "sensitive": bool(t.records.sensitive),
        }
        for n, t in result.taxa.items()
    ]
    out.append(html_table(recs, ["taxon", "records kept", "sensitive"]))
    out.append("<h3>Records intake did not keep</h3>")
    drops = [
        {"line": d.line, "occurrence ID": d.occurrence_id, "taxon": d.taxon,
         "reason": d.reason}
        for d in (result.dropped or [])
    ]
    has_ids = any(d["occurrence ID"] for d in drops)
    out.append(
        html_table(drops, ["line"] + (["occurrence ID"] if has_ids else [])
                   + ["taxon", "reason"])
        if drops
        else '<p class="note">Intake kept every record row.</p>'
    )
    return "\n".join(out)


def _taxon_section(result, name, tr) -> str:
    out = [f"<h3>{_e(name)}</h3>"]
    out.append(
        _safe_figure(
            lambda: maps.plot_suitability(result, name),
            f"Consensus suitability of {name} with its records.",
            f"suitability map of {name}",
        )
    )
    if tr.thresholds:
        out.append(
            _safe_figure(
                lambda: maps.plot_ranges(result, name),
                f"Range of {name} at the MTP and relaxed thresholds.",
                f"range map of {name}",
            )
        )
    if tr.evaluation:
        out.append(html_table(tr.evaluation, caption="Evaluation"))
    figs = getattr(tr, "figures", None) or {}
    from screener.outputs import model_figures

    for family, curves in (figs.get("response_curves") or {}).items():
        out.append(_safe_figure(
            lambda c=curves: model_figures.plot_response_curves(c),
            f"Response curves of the {family} model for {name}: suitability along each "
            "layer with the others held at their medians at the records.",
            f"response curves {family} {name}",
        ))
    for family, imp in (figs.get("importance") or {}).items():
        out.append(_safe_figure(
            lambda i=imp: model_figures.plot_importance(i),
            f"Permutation importance of each layer in the {family} model for {name}: the "
            "drop in training AUC when that layer's values are shuffled.",
            f"permutation importance {family} {name}",
        ))
    th = [
        {
            "threshold": t.name,
            "value": t.value,
            "area (km²)": t.area_km2,
            "training omission": t.training_omission,
        }
        for t in (tr.thresholds or {}).values()
    ]
    if th:
        out.append(html_table(th, caption="Thresholds"))
    if tr.mess is not None:
        m = np.asarray(tr.mess, float)
        ok = np.isfinite(m)
        if ok.any():
            share = float((m[ok] < 0).mean())
            out.append(
                f'<p class="note">Novel environment (MESS &lt; 0) covers '
                f"{100 * share:.1f}% of the valid cells for this taxon; "
                "predictions there are extrapolations.</p>"
            )
    return "\n".join(out)


def _overlap(result) -> str:
    out = []
    ov = result.overlap
    if ov is not None and len(ov):
        out.append(html_table(ov))
    else:
        out.append('<p class="note">No niche overlap was computed.</p>')
    if result.overlap_readings:
        out.append(
            "<ul>"
            + "".join(f"<li>{_e(r)}</li>" for r in result.overlap_readings)
            + "</ul>"
        )
    out.append(
        '<p class="note">D (Schoener) and I (Hellinger-based) run from 0 (no overlap) '
        "to 1 (identical). A small equivalency p means the niches are less alike "
        "than random reassignment of the records gives; a small similarity p means "
        "they are more (or less) alike than random records from the other taxon's "
        "accessible area give. Each p-value comes with its Monte Carlo standard error "
        "and the replicates behind it; the readings claim only what survives Holm's "
        "correction over every p-value of the run (columns ending _holm). In "
        "geographic space the tests refit one model per replicate, so the D they test "
        "(D_tested) can differ from the D of the reported maps.</p>"
    )
    out.extend(_overlap_figures(result))
    return "\n".join(out)


def _overlap_figures(result) -> list:
    """Occupancy surfaces and null distributions of each compared pair."""
    from screener.outputs import overlap_figures

    out = []
    for cmp in getattr(result, "comparisons", None) or []:
        a, b = cmp.taxon_a, cmp.taxon_b
        if cmp.space is not None:
            d_env = cmp.environmental.D if cmp.environmental is not None else None
            out.append(_safe_figure(
                lambda cmp=cmp, a=a, b=b, d=d_env: overlap_figures.plot_niches(
                    cmp.space, names=(a, b), D=d),
                f"Niches of {a} and {b} in their shared environmental space.",
                f"niches in environmental space {a} {b}",
            ))
        for sc in (cmp.environmental, cmp.geographic):
            if sc is None:
                continue
            for label, test in (("equivalency", sc.equivalency),
                                ("similarity A to B", sc.similarity_ab),
                                ("similarity B to A", sc.similarity_ba)):
                if not test:
                    continue
                out.append(_safe_figure(
                    lambda t=test["D"], d=sc.D: overlap_figures.plot_null_distribution(
                        t, reported_d=d),
                    f"{a} vs {b}, {sc.space} space, {label} test: null distribution of "
                    "D with the tested value marked.",
                    f"null distribution {label} {sc.space} {a} {b}",
                ))
    return out


def _plan(result) -> str:
    sites = result.sites
    if sites is None or len(sites) == 0:
        return '<p class="note">No candidate sites were found.</p>'
    out = [
        _safe_figure(
            lambda: maps.plot_sites(result),
            "Ranked candidate sites, numbered by rank.",
            "site map",
        )
    ]
    if result.paths is not None and len(result.paths):
        out.append(
            _safe_figure(
                lambda: maps.plot_paths(result),
                "Least-cost paths and barriers.",
                "path map",
            )
        )
    base = [
        "rank",
        "site_id",
        "kind",
        "longitude",
        "latitude",
        "area_km2",
        "mean_suitability",
        "agreement",
        "novel_share",
        "nearest_taxon",
        "gap_km",
        "walk_hours",
        "score",
        "rank_robustness",
    ]
    cols = [c for c in base if c in sites.columns]
    cols += [c for c in sites.columns if str(c).startswith("score_")]
    out.append(
        html_table(
            sites.drop(columns="geometry", errors="ignore"),
            cols,
            caption="Ranked plan with the weighted score components",
        )
    )
    return "\n".join(out)


def _novelty(result) -> str:
    items = [str(w) for w in (result.warnings or [])]
    sites = result.sites
    if sites is not None and len(sites) and "novel_share" in sites.columns:
        novel = sites[sites["novel_share"].astype(float) > 0]
        for r in novel.to_dict("records"):
            items.append(
                f"Site {r['site_id']} (rank {int(r['rank'])}): "
                f"{100 * float(r['novel_share']):.0f}% of its cells lie in "
                "environments outside the calibration range."
            )
    if not items:
        return '<p class="note">No warnings.</p>'
    return "<ul>" + "".join(f"<li>{_e(i)}</li>" for i in items) + "</ul>"


def _provenance(result) -> str:
    prov = dict(result.provenance or {})
    if result.settings:
        prov["settings"] = result.settings
    if not prov:
        return '<p class="note">No provenance recorded.</p>'
    rows = [
        {
            "key": k,
            "value": v
            if isinstance(v, (int, float, str))
            else json.dumps(v, default=str, sort_keys=True),
        }
        for k, v in prov.items()
    ]
    return html_table(rows, ["key", "value"])


def render_report(result, *, title: str = "Survey screening report") -> str:
    """Render a RunResult as one self-contained HTML page.

    Parameters
    ----------
    result : screener.results.RunResult
    title : str, default "Survey screening report"

    Returns
    -------
    str
        The HTML document.  It holds the inputs and the dropped records (line and
        reason), per-taxon maps, evaluation and thresholds, niche overlap in plain
        words, the ranked plan with its score components, novelty warnings,
        provenance and the cautions.  Pages with sensitive records at full
        precision carry the marker "FULL PRECISION: do not share".
    """
    marker = has_full_precision_sensitive(result)
    sections = [
        ("inputs", "Inputs", _inputs(result)),
        (
            "taxa",
            "Per taxon: models, evaluation and thresholds",
            "\n".join(_taxon_section(result, n, t) for n, t in result.taxa.items()),
        ),
        ("overlap", "Niche overlap and its tests", _overlap(result)),
        ("plan", "Ranked survey plan", _plan(result)),
        ("novelty", "Novelty and other warnings", _novelty(result)),
        ("provenance", "Provenance", _provenance(result)),
        ("cautions", "Cautions", cautions_html()),
    ]
    nav = "".join(f'<a href="#{sid}">{_e(head)}</a>' for sid, head, _ in sections)
    body = [f"<h1>{_e(title)}</h1>"]
    if marker:
        body.append(
            f'<p class="marker">{_e(FULL_PRECISION_MARKER)}</p>'
            '<p class="note">This report shows records of sensitive taxa at '
            "full precision. Share only a generalised version.</p>"
        )
    body.append(
        f'<p class="note">Written {_e(dt.date.today().isoformat())}. '
        "Predictions are hypotheses for survey, not evidence of presence or "
        "absence.</p>"
    )
    body.append(f"<nav>{nav}</nav>")
    for sid, head, content in sections:
        body.append(f'<section id="{sid}"><h2>{_e(head)}</h2>\n{content}</section>')
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>\n"
        + "\n".join(body)
        + "\n</body></html>\n"
    )
