"""The run report: one self-contained HTML file, laid out around the survey plan.

The conclusion comes first, in plain words; then the plan; then one evidence card per
taxon (how well its model is supported, what limits it, what it implies for the
sites); then overlap, inputs, warnings, cautions and the raw provenance at the end.

Figures are embedded as base64 PNG, the style sheet is inline, and there is no
JavaScript and no external asset, so the file can be mailed, archived or opened
offline.  Every piece of user text (taxon names, file names, reasons, settings) is
escaped with :func:`html.escape`.
"""

from __future__ import annotations

import datetime as dt
import html
import json
import logging
import math

import numpy as np

from screener import __version__
from screener.outputs import maps
from screener.outputs._figure import png_data_uri
from screener.outputs.cautions import cautions_html
from screener.outputs.privacy import FULL_PRECISION_MARKER, has_full_precision_sensitive
from screener.project import default

__all__ = ["render_report", "html_table"]

log = logging.getLogger(__name__)

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#222;
max-width:1200px;margin:2em auto;padding:0 1.5em;line-height:1.45;background:#fff}
h1{font-size:1.6em;border-bottom:2px solid #222;padding-bottom:.2em}
h2{font-size:1.25em;margin-top:2em;border-bottom:1px solid #bbb}
h3{font-size:1.05em;margin-top:1.4em}
.wide{max-width:100%;overflow-x:auto}
table{border-collapse:collapse;font-size:.85em;margin:.6em 0 1.2em}
th,td{border:1px solid #ccc;padding:.25em .5em;text-align:left;vertical-align:top}
th{background:#f0f0f0}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
figure{margin:1em 0}figure img{max-width:100%;height:auto;border:1px solid #ddd}
figcaption{font-size:.85em;color:#444}
.marker{border:2px solid #000;padding:.3em .6em;font-weight:bold;display:inline-block}
.note{color:#444;font-size:.9em}
.conclusion{background:#f6f6f2;border-left:4px solid #444;padding:.6em 1.2em}
.card{border:1px solid #bbb;border-radius:4px;padding:.2em 1.2em 1em;margin:1.4em 0}
.card .cols{display:flex;flex-wrap:wrap;gap:1.5em}
.card .cols>div{flex:1 1 380px;min-width:0}
.card dt{font-weight:bold;margin-top:.6em}.card dd{margin-left:1em}
dl.cautions dt{font-weight:bold;margin-top:.6em}dl.cautions dd{margin-left:1em}
pre{white-space:pre-wrap;overflow-wrap:anywhere;font-size:.8em;background:#f7f7f7;
padding:.8em;border:1px solid #ddd}
nav{display:flex;flex-wrap:wrap;gap:.2em 1em}nav a{white-space:nowrap}
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


def _header(column) -> str:
    """A column name, escaped, that may break after its underscores (so that a table
    of long column names such as ``score_isolation_history`` fits a narrow page)."""
    return _e(column).replace("_", "_<wbr>")


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
    out = ['<div class="wide"><table>']
    if caption:
        out.append(f"<caption>{_e(caption)}</caption>")
    out.append(
        "<thead><tr>"
        + "".join(f"<th>{_header(c)}</th>" for c in columns)
        + "</tr></thead><tbody>"
    )
    for r in rows:
        out.append("<tr>" + "".join(_cell(r.get(c, "")) for c in columns) + "</tr>")
    out.append("</tbody></table></div>")
    return "\n".join(out)


def _figure(fig_or_ax, caption: str, alt: str) -> str:
    fig = getattr(fig_or_ax, "figure", fig_or_ax)
    uri = png_data_uri(maps.figure_to_png_bytes(fig))
    return (
        f'<figure><img alt="{_e(alt)}" src="{uri}">'
        f"<figcaption>{_e(caption)}</figcaption></figure>"
    )


def _safe_figure(make, caption, alt):
    try:
        return _figure(make(), caption, alt)
    except Exception as exc:  # a figure must not sink the whole report
        log.warning("figure %r failed: %s", alt, exc)
        return f'<p class="note">Figure "{_e(alt)}" could not be drawn: {_e(exc)}</p>'


def _fmt(v, spec=".2f", missing="n/a") -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return missing
    return format(f, spec) if math.isfinite(f) else missing


def _day_hours(result) -> float:
    return float((result.settings.get("access") or {}).get("walking_day_hours", default("access", "walking_day_hours")))


def _threshold_name(result) -> str:
    return str((result.settings.get("thresholds") or {}).get("use", default("thresholds", "use")))


def _taxon_card(result, name, tr) -> str:
    """One taxon's evidence: support, limits, implications for the sites."""
    from screener.evidence import taxon_evidence
    from screener.outputs import model_figures
    from screener.outputs.sheets import THRESHOLD_WORDS

    ev = taxon_evidence(result, name, threshold_name=_threshold_name(result))
    support = [
        f"<strong>{_e(ev.supported.capitalize())}.</strong> {ev.n_records} records kept."
    ]
    for h in ev.held_out:
        tests = []
        if math.isfinite(h["null_p"]):
            tests.append(f"null-model p = {_fmt(h['null_p'], '.3g')}")
        if math.isfinite(h["jackknife_p"]):
            tests.append(f"jackknife p = {_fmt(h['jackknife_p'], '.3g')}")
        support.append(
            f"{_e(h['family'])} ({_e(h['method'])} hold-out): AUC "
            f"{_fmt(h['auc'])}, omission at the minimum training presence "
            f"{_fmt(h['omission'])}" + (f"; {', '.join(tests)}" if tests else "")
        )
    limits = ev.limits or ["None of the checked limits applies (records, clustering, "
                           "extrapolation)."]
    if ev.clustering is not None and not any("clustered" in x for x in ev.limits):
        limits.append(
            f"Records are not detectably clustered (Clark-Evans R = "
            f"{ev.clustering.ratio:.2f})."
        )
    words = THRESHOLD_WORDS.get(ev.threshold_name, ev.threshold_name)
    implied = [
        f"Suitable at or above {_fmt(ev.threshold, '.3f')} (its {_e(words)}), "
        f"{_fmt(ev.range_km2, ',.0f')} km² of ground."
    ]
    if ev.site_ids:
        implied.append(
            "Sites whose suitability comes from this model: "
            + ", ".join(_e(s) for s in ev.site_ids)
            + "."
        )
    else:
        implied.append("No ranked site takes its suitability from this model.")
    if ev.supported != "supported":
        implied.append("Treat those sites as weaker leads than the score alone says.")

    def dl(items):
        return "<ul>" + "".join(f"<li>{i}</li>" for i in items) + "</ul>"

    left = (
        "<dl><dt>How well the model is supported</dt><dd>" + dl(support) + "</dd>"
        "<dt>What limits it</dt><dd>" + dl([_e(x) for x in limits]) + "</dd>"
        "<dt>What it implies for the sites</dt><dd>" + dl(implied) + "</dd></dl>"
    )
    right = _safe_figure(
        lambda: maps.plot_suitability(result, name, caption=False),
        f"Consensus suitability of {name} with its {tr.records.n} records; a "
        "hypothesis for survey, not a map of presence.",
        f"suitability map of {name}",
    )
    out = [
        f'<article class="card"><h3>{_e(name)}</h3>',
        f'<div class="cols"><div>{left}</div><div>{right}</div></div>',
    ]
    if tr.presence_env is not None and tr.background_env is not None:
        curves = list(((tr.figures or {}).get("response_curves") or {}).values())
        out.append(
            _safe_figure(
                lambda: model_figures.plot_niche_profile(
                    tr.presence_env, tr.background_env, result.layer_names,
                    curves or None, taxon=name,
                ),
                f"Where the records of {name} sit in the environment available to it, "
                "layer by layer, with the model's suitability along each layer (the "
                "other layers at the records' medians).",
                f"niche profile of {name}",
            )
        )
    out.append("</article>")
    return "\n".join(out)


def _overlap(result) -> str:
    out = []
    if result.overlap_readings:
        out.append(
            "<ul>"
            + "".join(f"<li>{_e(r)}</li>" for r in result.overlap_readings)
            + "</ul>"
        )
    ov = result.overlap
    if ov is not None and len(ov):
        out.extend(_overlap_tables(ov))
    else:
        out.append('<p class="note">No niche overlap was computed.</p>')
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


#: overlap.csv columns that name a compared pair; they start each overlap table
_PAIR_COLUMNS = ("taxon_a", "taxon_b", "space")
#: overlap.csv columns of the tests' precision, left to the file (the readings cite them)
_PRECISION_SUFFIXES = ("_se", "_replicates")


def _overlap_tables(ov) -> list:
    """overlap.csv as two tables that fit the page: D, I and the tests' p-values, then
    niche breadth and dynamics; each p-value's Monte Carlo error and replicate count
    stay in the file."""
    cols = [str(c) for c in ov.columns]
    keys = [c for c in _PAIR_COLUMNS if c in cols]
    shown = [c for c in cols if c not in keys and not c.endswith(_PRECISION_SUFFIXES)]
    tests = [c for c in shown if c in ("D", "I", "D_tested", "n_replicates")
             or "_p" in c]
    rest = [c for c in shown if c not in tests]
    out = [html_table(ov, keys + tests, caption="Overlap and its tests (p-values with "
                      "their Holm-corrected values; standard errors and replicate "
                      "counts are in overlap.csv)")]
    if rest:
        out.append(html_table(ov, keys + rest, caption="Niche breadth and niche "
                              "dynamics of each pair"))
    return out


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


def _plan_rows(result) -> list:
    from screener.evidence import site_taxa
    from screener.outputs.sheets import coordinate_precision

    decimals, _ = coordinate_precision(result.grid)
    day = _day_hours(result)
    routes = getattr(result, "routes", None) or {}
    models = site_taxa(result)
    rows = []
    for r in result.sites.drop(columns="geometry", errors="ignore").to_dict("records"):
        sid = str(r["site_id"])
        route = routes.get(sid)
        row = {
            "rank": int(r["rank"]),
            "site": r["site_id"],
            "kind": r.get("kind", ""),
            "lat, lon": f"{float(r['latitude']):.{decimals}f}, "
            f"{float(r['longitude']):.{decimals}f}",
            "area (km²)": r.get("area_km2", math.nan),
            "suitability (mean)": r.get("mean_suitability", math.nan),
            # the candidates.csv names: share of cells with MESS < 0, and of cells
            # where a model's predictors were clamped to its calibration range
            "novel_share": r.get("novel_share", math.nan),
            "clamped_share": r.get("clamped_share", math.nan),
            "model": models.get(sid, ""),
            "gap (km)": r.get("gap_km", math.nan),
            "walk from": route.start_name if route else "",
            "walk (h)": r.get("walk_hours", math.nan),
            "days": route.days(day) if route else "",
            "score": r.get("score", math.nan),
            "robustness": r.get("rank_robustness", math.nan),
        }
        rows.append(row)
    return rows


def _plan(result) -> str:
    sites = result.sites
    if sites is None or len(sites) == 0:
        return '<p class="note">No candidate sites were found.</p>'
    out = [
        _safe_figure(
            lambda: maps.plot_sites(result, caption=False),
            "Ranked candidate sites, numbered by rank, over the terrain; outline "
            "style gives the kind of site. Sites are survey hypotheses; check permits "
            "and access first.",
            "site map",
        )
    ]
    day = _day_hours(result)
    out.append(
        html_table(
            _plan_rows(result),
            caption=f"Ranked plan. Walk: slope-only estimate from the nearest start "
            f"point; days at a {day:g} h walking day (common practice 6-8 h). "
            "Robustness: share of random weightings that keep the site among the top. "
            "novel_share: share of the site's cells in novel environments (MESS < 0); "
            "clamped_share: share where a model's predictors lay outside its "
            "calibration range and were clamped.",
        )
    )
    score_cols = [c for c in sites.columns if str(c).startswith("score_")]
    if score_cols:
        comp = sites.drop(columns="geometry", errors="ignore")[
            ["rank", "site_id", "score", *score_cols]
        ]
        out.append("<h3>Why each site ranks where it does</h3>")
        out.append(html_table(comp, caption="Weighted score components (they add up "
                              "to the score)"))
    if result.paths is not None and len(result.paths):
        out.append(
            _safe_figure(
                lambda: maps.plot_paths(result, caption=False),
                "Least-cost paths over inverted suitability from the known ranges to "
                "near-range and isolated sites; shaded cells are barriers, darker "
                "where less suitable.",
                "path map",
            )
        )
    return "\n".join(out)


def _conclusion(result) -> str:
    """Where to go first and why, in plain words."""
    from screener.evidence import site_taxa

    sites = result.sites
    if sites is None or len(sites) == 0:
        return (
            '<div class="conclusion"><p>No candidate site was found at these '
            "thresholds. Relax the threshold or the minimum patch area, or add "
            "records.</p></div>"
        )
    day = _day_hours(result)
    routes = getattr(result, "routes", None) or {}
    models = site_taxa(result)
    top = sites.iloc[0]
    sid = str(top["site_id"])
    why = (
        f"Go first to site <strong>{_e(sid)}</strong>: {_article(top.get('kind', ''))} "
        f"{_e(top.get('kind', ''))} patch of {_fmt(top.get('area_km2'), ',.1f')} km²"
    )
    if math.isfinite(_float(top.get("gap_km"))) and _float(top.get("gap_km")) > 0:
        why += (
            f", {_fmt(top.get('gap_km'), '.1f')} km of unsuitable ground from the "
            f"nearest known range ({_e(top.get('nearest_taxon', ''))})"
        )
    why += (
        f". Its suitability ({_fmt(top.get('mean_suitability'))} on average) comes "
        f"from the {_e(models.get(sid, ''))} model; under 90 % of random weightings of "
        f"the score it ranks {_fmt(top.get('rank_low'), '.0f')} to "
        f"{_fmt(top.get('rank_high'), '.0f')}, and bootstrap refits of the records keep "
        f"it suitable in {_fmt(100 * _float(top.get('refit_suitable')), '.0f')}% of "
        "refits."
    )
    route = routes.get(sid)
    if route is not None:
        why += (
            f" Walk in from {_e(route.start_name)}: {route.distance_km:.1f} km, "
            f"{route.ascent_m:,.0f} m of climbing, about {route.hours:.1f} h "
            f"({route.days(day)} day(s) at {day:g} h a day)."
        )
    head = sites.head(min(len(sites), 10))
    cheap, care = [], []
    for r in head.to_dict("records"):
        s_id = str(r["site_id"])
        walk = _float(r.get("walk_hours"))
        reasons = []
        if math.isfinite(walk) and walk > 2 * day:
            reasons.append(f"more than two walking days ({walk:.0f} h)")
        if not math.isfinite(walk) and routes:
            reasons.append("no walking route from any start point")
        for col, words in (("novel_share", "novel environment (MESS < 0)"),
                           ("clamped_share", "clamped predictors")):
            if _float(r.get(col)) > 0.25:
                reasons.append(f"{words} in {100 * _float(r.get(col)):.0f}% of its "
                               f"cells ({col})")
        if _float(r.get("rank_robustness")) < 0.5:
            reasons.append("its rank depends on the weights")
        if _float(r.get("refit_suitable")) < 0.5:
            reasons.append("refits of the records often lose it")
        if reasons:
            care.append(f"{_e(s_id)} ({_e('; '.join(reasons))})")
        elif math.isfinite(walk) and walk <= day:
            cheap.append(f"{_e(s_id)} ({walk:.1f} h)")
    items = [why]
    items.append(
        "Cheap to reach (within one walking day): "
        + (", ".join(cheap) if cheap else "none of the top sites")
        + "."
    )
    items.append(
        "Need care: " + (", ".join(care) if care else "none of the top sites") + "."
    )
    items.append(_overlap_summary(result))
    items.append(
        "All of this is a set of hypotheses for survey, resting on few records: a "
        "site may hold nothing, and finding nothing is not proof of absence."
    )
    return '<div class="conclusion">' + "".join(f"<p>{i}</p>" for i in items) + "</div>"


def _article(word) -> str:
    return "an" if str(word)[:1].lower() in "aeiou" and str(word) else "a"


def _float(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _overlap_summary(result) -> str:
    """One sentence on the pairs: how many the equivalency test finds different, by the
    same rule as the readings (Holm-corrected p below alpha, in either space)."""
    ov = result.overlap
    if ov is None or not len(ov) or "equivalency_p" not in getattr(ov, "columns", []):
        return "Niche overlap: not computed (one taxon, or no tests run)."
    env = ov[ov["space"] == "environmental"] if "space" in ov.columns else ov
    alpha = float(((result.settings or {}).get("overlap") or {}).get("alpha")
                  or default("overlap", "alpha"))
    # the readings' rule: the Holm-adjusted p (the raw p where no correction was made)
    column = "equivalency_p_holm" if "equivalency_p_holm" in ov.columns else "equivalency_p"
    # a pair differs when either space's p does (overlap.csv has a row per space)
    p = ov.groupby(["taxon_a", "taxon_b"], sort=False)[column].min().astype(float)
    n, differ = len(p), int((p < alpha).sum())
    corrected = (f"Holm-corrected equivalency p below {alpha:g} in either space"
                 if column.endswith("_holm") else f"equivalency p below {alpha:g}")
    txt = (
        f"Niche overlap: of {n} pair(s) of taxa compared, {differ} differ more than "
        f"random reassignment of their records gives ({corrected})"
    )
    if "D" in env.columns and n:
        txt += (
            f"; D in environmental space ranges from {env['D'].astype(float).min():.2f} to "
            f"{env['D'].astype(float).max():.2f}"
        )
    return txt + (
        ". With few records these tests have little power: 'not different' is not "
        "'the same', and D describes the models, not the animals."
    )


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
    dropped = list(result.dropped or [])
    if not dropped:
        out.append('<p class="note">Intake kept every record row.</p>')
        return "\n".join(out)
    from screener.records import summarise_drops

    groups = [{"reason": g["reason"], "rows": g["rows"],
               "first lines": ", ".join(map(str, g["first_lines"]))
               + (", ..." if g["rows"] > len(g["first_lines"]) else ""),
               "what to do": g["advice"]} for g in summarise_drops(dropped)]
    out.append(f'<p>{len(dropped):,} record rows were dropped. Every row, with its reason, '
               'is in <code>dropped_records.csv</code>, beside this report.</p>')
    out.append(html_table(groups, ["reason", "rows", "first lines", "what to do"]))
    shown = dropped[:_DROPPED_SHOWN]
    rows = [{"line": d.line, "occurrence ID": d.occurrence_id, "taxon": d.taxon,
             "reason": d.reason} for d in shown]
    has_ids = any(r["occurrence ID"] for r in rows)
    out.append(html_table(rows, ["line"] + (["occurrence ID"] if has_ids else [])
                          + ["taxon", "reason"]))
    if len(dropped) > len(shown):
        out.append(f'<p class="note">The first {len(shown)} rows are shown; see '
                   'dropped_records.csv for the rest.</p>')
    return "\n".join(out)


#: dropped rows listed one by one in the report (the rest are in dropped_records.csv)
_DROPPED_SHOWN = 20


def _novelty(result) -> str:
    items = [str(w) for w in (result.warnings or [])]
    sites = result.sites
    if sites is not None and len(sites):
        for r in sites.to_dict("records"):
            novel, clamped = _float(r.get("novel_share")), _float(r.get("clamped_share"))
            parts = []
            if novel > 0:
                parts.append(f"novel_share {100 * novel:.0f}% (cells in environments "
                             "outside the calibration range, MESS < 0)")
            if clamped > 0:
                parts.append(f"clamped_share {100 * clamped:.0f}% (cells where a "
                             "model's predictors were clamped to its calibration range)")
            if parts:
                items.append(f"Site {r['site_id']} (rank {int(r['rank'])}): "
                             + "; ".join(parts) + ".")
    if not items:
        return '<p class="note">No warnings.</p>'
    return "<ul>" + "".join(f"<li>{_e(i)}</li>" for i in items) + "</ul>"


def _provenance(result) -> str:
    prov = dict(result.provenance or {})
    if result.settings:
        prov["settings"] = result.settings
    if not prov:
        return '<p class="note">No provenance recorded.</p>'
    text = json.dumps(prov, default=str, sort_keys=True, indent=2)
    return (
        '<p class="note">Versions, settings, input hashes and seeds of this run, as '
        "recorded in run.json.</p><details><summary>Raw provenance (JSON)</summary>"
        f"<pre>{_e(text)}</pre></details>"
    )


def render_report(result, *, title: str | None = None) -> str:
    """Render a RunResult as one self-contained HTML page.

    Parameters
    ----------
    result : screener.results.RunResult
    title : str, optional
        Page title; by default the project name followed by "survey screening
        report".

    Returns
    -------
    str
        The HTML document, in the order a survey leader reads it: the conclusion in
        plain words (where to go first and why, which sites are cheap to reach and
        which need care, what the overlap tests say), the plan (site map, ranked
        table with walking estimates, score components, paths), one evidence card
        per taxon (how well the model is supported, what limits it, what it implies
        for the sites), niche overlap, inputs and dropped records, warnings, the
        cautions, and the raw provenance at the end.  Pages with sensitive records at
        full precision carry the marker "FULL PRECISION: do not share".
    """
    project = str((result.settings.get("project") or {}).get("name") or "").strip()
    if title is None:
        title = f"{project}: survey screening report" if project else (
            "Survey screening report"
        )
    marker = has_full_precision_sensitive(result)
    sections = [
        ("conclusion", "Where to go first", _conclusion(result)),
        ("plan", "The plan", _plan(result)),
        (
            "taxa",
            "The evidence, taxon by taxon",
            "\n".join(_taxon_card(result, n, t) for n, t in result.taxa.items()),
        ),
        ("overlap", "Niche overlap and its tests", _overlap(result)),
        ("inputs", "Inputs", _inputs(result)),
    ]
    if getattr(result, "slices", None) is not None:
        from screener.outputs.timeslices import report_section

        sections.append(("history", "Climate through time",
                         report_section(result, _safe_figure, html_table)))
    sections += [
        ("novelty", "Novelty and other warnings", _novelty(result)),
        ("cautions", "Cautions", cautions_html()),
        ("provenance", "Provenance", _provenance(result)),
    ]
    nav = "\n".join(f'<a href="#{sid}">{_e(head)}</a>' for sid, head, _ in sections)
    body = [f"<h1>{_e(title)}</h1>"]
    if marker:
        body.append(
            f'<p class="marker">{_e(FULL_PRECISION_MARKER)}</p>'
            '<p class="note">This report shows records of sensitive taxa at '
            "full precision. Share only a generalised version.</p>"
        )
    body.append(
        f'<p class="note">Written {_e(dt.date.today().isoformat())} by screener '
        f"{_e(__version__)}. Predictions are hypotheses for survey, not evidence of "
        "presence or absence.</p>"
    )
    body.append(f"<nav>{nav}</nav>")
    for sid, head, content in sections:
        body.append(f'<section id="{sid}"><h2>{_e(head)}</h2>\n{content}</section>')
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>\n"
        + "\n".join(body)
        + "\n</body></html>\n"
    )
