"""One self-contained HTML report of a backtest run (optionally compared with a second run).

The file opens with no network: the plotly library is inlined once, chart data is embedded
as JSON in the page, and no fonts or styles are fetched. Every string that comes from the
logs, the catalog or the manifest is HTML-escaped; the chart JSON is written so that no
``</script>`` (or any ``<``) inside a campaign id can end the script element.

After rendering, the page records its own status in ``document.title`` and in the hidden
element ``#render-status`` (charts expected, charts rendered, script errors), which the
browser test reads.
"""

from __future__ import annotations

import html
import json
import math
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from replay.analysis.compare import _open as _compare_open
from replay.analysis.compare import _run_label as _compare_run_label
from replay.errors import ReplayError, UsageError

#: Colours of the page and charts (our own neutral palette).
PALETTE = ("#2f6f73", "#c2773a", "#7a6fa8", "#5b8c3a", "#b5485d", "#4a6fa5", "#8c7a5b")
FONT = 'system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif'
#: Budget multipliers of the budget-response curves (0.25x to 4x, 16 points, plus 1x).
CURVE_SCALES = np.unique(np.append(np.geomspace(0.25, 4.0, 16), 1.0))
DEFAULT_CHOSEN = 4
MAX_TABLE_ROWS = 300
MAX_BARS = 40
MAX_POINTS = 2000  # per campaign and line: longer series are thinned evenly

CAUTION_HEADER = "Read before acting on these numbers"


def esc(x: object) -> str:
    """HTML-escape any value for the page (quotes included)."""
    return html.escape("" if x is None else str(x), quote=True)


def safe_json(obj: object) -> str:
    """JSON for a ``<script>`` element: no ``<``, ``>`` or ``&`` survive, so no campaign id
    (``</script>...``) can close the element or open a comment."""
    text = json.dumps(obj, allow_nan=False, default=_json_default, separators=(",", ":"))
    return (text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
            .replace("\u2028", "\\u2028").replace("\u2029", "\\u2029"))


def _json_default(o: object) -> object:
    if isinstance(o, datetime):
        return o.isoformat()
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def _clean(values: Sequence[Any]) -> list[Any]:
    """Chart values: NaN and inf become null (JSON has neither)."""
    out = []
    for v in values:
        if isinstance(v, float) and not math.isfinite(v):
            out.append(None)
        else:
            out.append(v)
    return out


def _num(x: Any, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "&ndash;"
    if isinstance(x, (int, np.integer)) and not isinstance(x, bool):
        return f"{int(x):,}"
    x = float(x)
    if x != 0 and (abs(x) >= 1e6 or abs(x) < 1e-3):
        return f"{x:.{digits - 1}e}"
    return f"{x:,.{digits}g}" if abs(x) < 1000 else f"{x:,.0f}"


def _pct(x: Any, digits: int = 1) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "&ndash;"
    return f"{float(x) * 100:.{digits}f}%"


class _Charts:
    """Charts of one page: each gets a div id; the specs go into one JSON element."""

    def __init__(self) -> None:
        self.specs: list[dict[str, Any]] = []

    def add(self, data: list[dict[str, Any]], layout: dict[str, Any], height: int = 380) -> str:
        cid = f"chart-{len(self.specs) + 1}"
        base = {
            "height": height, "margin": {"l": 64, "r": 24, "t": 48, "b": 96},
            "font": {"family": FONT, "size": 12, "color": "#1f2933"},
            "paper_bgcolor": "#ffffff", "plot_bgcolor": "#ffffff", "colorway": list(PALETTE),
            "hovermode": "closest",
            "legend": {"orientation": "h", "x": 0, "y": 1.02, "yanchor": "bottom"},
        }
        base.update(layout)
        for ax in ("xaxis", "yaxis"):
            base.setdefault(ax, {})
            base[ax].setdefault("gridcolor", "#e6e6e1")
            base[ax].setdefault("zerolinecolor", "#c9c9c2")
            base[ax].setdefault("automargin", True)
        self.specs.append({"id": cid, "data": data, "layout": base})
        return f'<div class="chart" id="{cid}" style="height:{height}px"></div>'


def _label(x: object) -> str:
    # Plotly reads a small HTML subset in chart text and decodes entities, so escaped text
    # shows as typed and cannot become markup.
    return html.escape("" if x is None else str(x), quote=False)


# --------------------------------------------------------------------------- page parts


def _header(man: dict, run_label: str, title: str) -> str:
    cat = man.get("catalog") or {}
    win = man.get("window") or {}
    sched = man.get("schedule") or {}
    sched_txt = (f"every {sched['every_seconds']} s" if sched.get("every_seconds")
                 else f"every {sched['every_n']} requests" if sched.get("every_n") else "-")
    rows = [
        ("run", run_label), ("rule", man.get("rule")),
        ("parameters", json.dumps(man.get("params") or {}, sort_keys=True)),
        ("sweep", json.dumps(man.get("sweep") or {}, sort_keys=True)),
        ("replay window", f"{win.get('start')} to {win.get('end')}"),
        ("fit window", f"{win.get('train_start')} to {win.get('train_end')}"),
        ("update schedule", sched_txt), ("charges", man.get("charges")),
        ("seed", man.get("seed")), ("catalog", cat.get("path")),
        ("catalog fingerprint", cat.get("fingerprint")),
        ("code version", man.get("code_version")), ("status", man.get("status")),
        ("created", man.get("created_at")),
    ]
    cells = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in rows)
    return f'<header><h1>{esc(title)}</h1><dl class="meta">{cells}</dl></header>'


def _cautions(man: dict, totals: pl.DataFrame) -> str:
    win = man.get("window") or {}
    items = [
        "<li><b>Competitors are held fixed.</b> Every auction is replayed against the logged "
        "minimum winning price, assumed unchanged by our bids; in reality other bidders and "
        "the platform's reserve prices would react to a different bid rule.</li>",
    ]
    if totals.height and "bids_above_logged" in totals.columns:
        share = totals["bids_above_logged"].drop_nulls()
        if share.len():
            worst = totals.sort("bids_above_logged", descending=True, nulls_last=True).row(
                0, named=True)
            items.append(
                "<li><b>Bids above the logged range are extrapolation.</b> On average "
                f"{_pct(share.mean(), 2)} of this run's bids per campaign were above the "
                "largest minimum winning price logged for their placement in the fit window "
                f"(highest: {_pct(worst['bids_above_logged'], 2)} in campaign "
                f"<code>{esc(worst['campaign_id'])}</code>). What such bids would really have "
                "cost or won is not in the logs.</li>")
    else:
        items.append("<li><b>Bids above the logged range are extrapolation.</b> This run "
                     "records no share of such bids.</li>")
    train_end, start = win.get("train_end"), win.get("start")
    fit = (f"<li><b>Fit windows end before replay windows.</b> Landscapes, traffic forecasts "
           f"and cold-start multipliers were fit on {esc(win.get('train_start'))} to "
           f"{esc(train_end)}; the replay starts at {esc(start)}.</li>")
    if train_end and start and str(train_end) > str(start):
        fit = ('<li class="alarm"><b>The fit window overlaps the replay window</b> '
               f"(fit ends {esc(train_end)}, replay starts {esc(start)}): the replay may "
               "have seen the future.</li>")
    items.append(fit)
    items.append("<li><b>Results are predictions.</b> A result is the predicted value of a "
                 "won impression summed over wins, not an observed outcome.</li>")
    return (f'<section class="cautions" id="cautions"><h2>{esc(CAUTION_HEADER)}</h2>'
            f"<ul>{''.join(items)}</ul></section>")


def _cards(t: pl.DataFrame) -> str:
    tot_res = t["results"].sum()
    tot_opt = t["opt_upper_bound"].sum() if "opt_upper_bound" in t.columns else None
    rr = t["relative_regret"].drop_nulls() if "relative_regret" in t.columns else pl.Series([])
    cards = [
        ("campaigns", _num(t.height)),
        ("results / hindsight optimum", f"{_num(tot_res)} / {_num(tot_opt)}"),
        ("spend / budget", f"{_num(t['spend'].sum())} / {_num(t['budget'].sum())}"),
        ("mean relative regret", _pct(rr.mean()) if rr.len() else "&ndash;"),
        ("median relative regret", _pct(rr.median()) if rr.len() else "&ndash;"),
    ]
    if "exhausted_at" in t.columns:
        cards.append(("budgets exhausted", _num(int(t["exhausted_at"].is_not_null().sum()))))
    if "cap_violated" in t.columns:
        cards.append(("cost caps violated", _num(int(t["cap_violated"].fill_null(False).sum()))))
    return '<div class="cards">' + "".join(
        f'<div class="card"><div class="k">{esc(k)}</div><div class="v">{v}</div></div>'
        for k, v in cards) + "</div>"


def _summary_table(t: pl.DataFrame) -> str:
    t = t.sort("regret", descending=True, nulls_last=True)
    note = ""
    if t.height > MAX_TABLE_ROWS:
        note = (f'<p class="note">Showing the {MAX_TABLE_ROWS} campaigns with the largest '
                f"regret of {t.height}.</p>")
        t = t.head(MAX_TABLE_ROWS)
    head = ("campaign", "budget", "spend", "budget used", "results", "cost per result",
            "avg CPM paid", "optimum results", "regret", "relative regret", "ran out at",
            "cap violated", "bids above logged")
    rows = []
    for r in t.iter_rows(named=True):
        wins = r.get("wins") or 0
        cpm = r["spend"] / wins * 1000.0 if wins else None
        ex = r.get("exhausted_at")
        rows.append("<tr>" + "".join([
            f"<td><code>{esc(r['campaign_id'])}</code></td>",
            f"<td>{_num(r.get('budget'))}</td>", f"<td>{_num(r.get('spend'))}</td>",
            f"<td>{_pct(r.get('budget_used'))}</td>", f"<td>{_num(r.get('results'))}</td>",
            f"<td>{_num(r.get('cost_per_result'))}</td>", f"<td>{_num(cpm)}</td>",
            f"<td>{_num(r.get('opt_upper_bound'))}</td>", f"<td>{_num(r.get('regret'))}</td>",
            f"<td>{_pct(r.get('relative_regret'))}</td>",
            f"<td>{esc(ex.strftime('%Y-%m-%d %H:%M') if ex else '-')}</td>",
            f"<td>{'yes' if r.get('cap_violated') else 'no'}</td>",
            f"<td>{_pct(r.get('bids_above_logged'), 2)}</td>"]) + "</tr>")
    ths = "".join(f"<th>{esc(h)}</th>" for h in head)
    return (f'{note}<div class="scroll"><table class="data"><thead><tr>{ths}</tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table></div>"
            '<p class="note">Budget, spend and cost per result in account currency; CPM is '
            "the average price per thousand won impressions; the optimum is the fractional "
            "hindsight LP bound of the same rows, window and budget.</p>")


def _regret_distribution(t: pl.DataFrame, charts: _Charts) -> str:
    k = t.filter(pl.col("relative_regret").is_not_null())
    if k.height == 0:
        return '<p class="note">No campaign has a relative regret (optimum of zero).</p>'
    x = (k["relative_regret"] * 100).to_list()
    ids = [_label(c) for c in k["campaign_id"].to_list()]
    data = [
        {"type": "histogram", "x": _clean(x), "nbinsx": min(40, max(5, k.height)),
         "name": "campaigns", "marker": {"color": PALETTE[0]},
         "hovertemplate": "relative regret %{x}%<br>%{y} campaigns<extra></extra>"},
        {"type": "box", "x": _clean(x), "yaxis": "y2", "name": "", "boxpoints": "all",
         "jitter": 0.4, "pointpos": 0, "text": ids, "marker": {"color": PALETTE[1]},
         "hovertemplate": "%{text}<br>%{x:.2f}%<extra></extra>", "showlegend": False},
    ]
    layout = {"xaxis": {"title": {"text": "relative regret (% of the hindsight optimum)"}},
              "yaxis": {"title": {"text": "campaigns"}, "domain": [0, 0.72]},
              "yaxis2": {"domain": [0.78, 1], "showticklabels": False},
              "showlegend": False, "bargap": 0.05}
    return charts.add(data, layout)


def _decomposition(t: pl.DataFrame, charts: _Charts) -> str:
    cols = ["regret_unspent", "regret_overpayment", "regret_misallocation",
            "regret_cap_slack"]
    if not all(c in t.columns for c in cols[:3]):
        return '<p class="note">This run has no regret decomposition.</p>'
    if "regret_cap_slack" not in t.columns:
        t = t.with_columns(pl.lit(None, dtype=pl.Float64).alias("regret_cap_slack"))
    k = t.filter(pl.all_horizontal(pl.col(c).is_not_null() for c in cols[:3]))
    if k.height == 0:
        return '<p class="note">No campaign has a regret decomposition.</p>'
    if k["regret_cap_slack"].is_null().all() or not k["regret_cap_slack"].abs().sum() > 0:
        cols = cols[:3]  # no cap binds (or a run written before the cap part existed)
    k = k.sort("regret", descending=True, nulls_last=True)
    note = ""
    if k.height > MAX_BARS:
        note = (f'<p class="note">The {MAX_BARS} campaigns with the largest regret of '
                f"{k.height}.</p>")
        k = k.head(MAX_BARS)
    ids = [_label(c) for c in k["campaign_id"].to_list()]
    names = {"regret_unspent": "unspent budget", "regret_overpayment": "overpayment",
             "regret_misallocation": "misallocation", "regret_cap_slack": "cap slack"}
    data = [{"type": "bar", "x": ids, "y": _clean(k[c].to_list()), "name": names[c],
             "marker": {"color": PALETTE[i]},
             "hovertemplate": "%{x}<br>" + names[c] + ": %{y:.4g} results<extra></extra>"}
            for i, c in enumerate(cols)]
    layout = {"barmode": "relative",
              "xaxis": {"title": {"text": "campaign (largest regret first)"},
                        "type": "category", "tickangle": -40},
              "yaxis": {"title": {"text": "regret (results)"}}}
    return note + charts.add(data, layout, height=420) + (
        '<p class="note">Regret = optimum - replayed results, split exactly with the '
        "optimum's multipliers (&lambda;* for the budget, &mu;* for a binding cost-per-result "
        "cap C): unspent budget &lambda;*(B - S), overpayment (&lambda;* + &mu;*)(S - "
        "C<sub>won</sub>) (paying above the minimum winning price), cap slack &mu;*(C R - S) "
        "(room left under the cap), and misallocation (rows bought below the optimum's "
        "threshold, rows missed above it).</p>")


def _thin(df: pl.DataFrame) -> pl.DataFrame:
    if df.height <= MAX_POINTS:
        return df
    idx = np.unique(np.linspace(0, df.height - 1, MAX_POINTS).astype(np.int64))
    return df[idx.tolist()]


def _series_of(series: pl.DataFrame, cid: str) -> pl.DataFrame:
    if series.height == 0:
        return series
    return _thin(series.filter(pl.col("campaign_id") == cid).sort("update"))


def _pacing(series: pl.DataFrame, t: pl.DataFrame, chosen: list[str], charts: _Charts) -> str:
    data = []
    for i, cid in enumerate(chosen):
        s = _series_of(series, cid)
        if s.height == 0:
            continue
        color = PALETTE[i % len(PALETTE)]
        name = _label(cid)
        ts = s["ts"].to_list()
        data.append({"type": "scatter", "mode": "lines", "x": ts,
                     "y": _clean(s["cum_spend"].to_list()), "name": f"{name} spend",
                     "legendgroup": name, "line": {"color": color, "width": 2},
                     "hovertemplate": name + "<br>%{x}<br>spend %{y:.4g}<extra></extra>"})
        data.append({"type": "scatter", "mode": "lines", "x": ts,
                     "y": _clean(s["cum_target"].to_list()), "name": f"{name} target",
                     "legendgroup": name, "line": {"color": color, "width": 1, "dash": "dot"},
                     "hovertemplate": name + "<br>%{x}<br>target %{y:.4g}<extra></extra>"})
    if not data:
        return '<p class="note">This run has no per-update series for these campaigns.</p>'
    layout = {"xaxis": {"title": {"text": "time (UTC)"}},
              "yaxis": {"title": {"text": "cumulative spend (currency)"}}}
    return charts.add(data, layout, height=420) + (
        '<p class="note">Solid: replayed cumulative spend; dotted: the rule\'s target '
        "curve.</p>")


def _lambda_paths(series: pl.DataFrame, t: pl.DataFrame, chosen: list[str],
                  charts: _Charts) -> str:
    data = []
    opt = dict(zip(t["campaign_id"].to_list(), t["opt_lambda"].to_list(), strict=True)) \
        if "opt_lambda" in t.columns else {}
    for i, cid in enumerate(chosen):
        s = _series_of(series, cid)
        if s.height == 0:
            continue
        color = PALETTE[i % len(PALETTE)]
        name = _label(cid)
        lam = [v if v is not None and v > 0 else None for v in _clean(s["lambda"].to_list())]
        ts = s["ts"].to_list()
        data.append({"type": "scatter", "mode": "lines", "x": ts, "y": lam, "name": name,
                     "legendgroup": name, "line": {"color": color, "shape": "hv"},
                     "hovertemplate": name + "<br>%{x}<br>\u03bb %{y:.4g}<extra></extra>"})
        star = opt.get(cid)
        if star is not None and math.isfinite(star) and star > 0 and ts:
            data.append({"type": "scatter", "mode": "lines", "x": [ts[0], ts[-1]],
                         "y": [star, star], "name": f"{name} \u03bb*",
                         "legendgroup": name, "line": {"color": color, "dash": "dash",
                                                       "width": 1},
                         "hovertemplate": name + " hindsight \u03bb* %{y:.4g}"
                                                 "<extra></extra>"})
    if not data:
        return '<p class="note">This run has no multiplier path for these campaigns.</p>'
    layout = {"xaxis": {"title": {"text": "time (UTC)"}},
              "yaxis": {"title": {"text": "\u03bb (results per currency)"}, "type": "log"}}
    return charts.add(data, layout, height=400) + (
        '<p class="note">The budget multiplier after each update (log scale); dashed: the '
        "hindsight optimum's &lambda;*. The rule bids value / &lambda;.</p>")


def _placements(pl_df: pl.DataFrame, chosen: list[str], charts: _Charts) -> str:
    if pl_df.height == 0:
        return '<p class="note">This run has no per-placement table.</p>'
    agg = (pl_df.group_by("placement", "pricing")
           .agg(pl.col("spend").sum(), pl.col("opt_spend").sum(), pl.col("wins").sum(),
                pl.col("results").sum(), pl.col("opt_results").sum())
           .sort("placement"))
    tot, tot_opt = agg["spend"].sum(), agg["opt_spend"].sum()
    names = [_label(f"{p} ({q.replace('_', ' ')})")
             for p, q in zip(agg["placement"].to_list(), agg["pricing"].to_list(), strict=True)]
    share = [s / tot if tot else None for s in agg["spend"].to_list()]
    share_opt = [s / tot_opt if tot_opt else None for s in agg["opt_spend"].to_list()]
    data = [
        {"type": "bar", "x": names, "y": _clean(share), "name": "replayed",
         "marker": {"color": PALETTE[0]},
         "hovertemplate": "%{x}<br>replayed %{y:.1%}<extra></extra>"},
        {"type": "bar", "x": names, "y": _clean(share_opt), "name": "hindsight optimum",
         "marker": {"color": PALETTE[1]},
         "hovertemplate": "%{x}<br>optimum %{y:.1%}<extra></extra>"},
    ]
    layout = {"barmode": "group", "xaxis": {"type": "category"},
              "yaxis": {"title": {"text": "share of spend, all campaigns"},
                        "tickformat": ".0%"}}
    out = charts.add(data, layout, height=360)
    rows = []
    sel = pl_df.filter(pl.col("campaign_id").is_in(chosen)).sort("campaign_id", "placement")
    for cid in chosen:
        part = sel.filter(pl.col("campaign_id") == cid)
        s_tot, o_tot = part["spend"].sum(), part["opt_spend"].sum()
        for r in part.iter_rows(named=True):
            wins = r.get("wins") or 0
            rows.append(
                f"<tr><td><code>{esc(cid)}</code></td><td>{esc(r['placement'])}</td>"
                f"<td>{esc(r['pricing'])}</td>"
                f"<td>{_pct(r['spend'] / s_tot if s_tot else None)}</td>"
                f"<td>{_pct(r['opt_spend'] / o_tot if o_tot else None)}</td>"
                f"<td>{_num(r['spend'] / wins * 1000.0 if wins else None)}</td>"
                f"<td>{_num(r.get('marginal_cost_per_result'))}</td>"
                f"<td>{_num(r.get('opt_marginal_cost_per_result'))}</td></tr>")
    if rows:
        head = ("campaign", "placement", "pricing", "spend share", "optimum's share",
                "avg CPM paid", "marginal cost per result", "optimum's marginal cost per result")
        ths = "".join(f"<th>{esc(h)}</th>" for h in head)
        out += (f'<div class="scroll"><table class="data"><thead><tr>{ths}</tr></thead>'
                f"<tbody>{''.join(rows)}</tbody></table></div>"
                '<p class="note">At the optimum the marginal cost per result is the same on '
                "every placement (1 / &lambda;*); a placement whose replayed marginal cost is "
                "far above the others is bought too dearly.</p>")
    return out


def _curves(man: dict, t: pl.DataFrame, chosen: list[str], charts: _Charts,
            others: list[tuple[str, pl.DataFrame]]) -> str:
    """Budget-response curves of the hindsight optimum for the chosen campaigns."""
    cat_info = man.get("catalog") or {}
    path = cat_info.get("path")
    if not path or not Path(path).exists():
        return (f'<p class="note">Budget-response curves are omitted: the run\'s catalog '
                f"<code>{esc(path)}</code> is not reachable from here.</p>")
    from replay.catalog import Catalog, to_us
    from replay.kernels.hindsight import budget_curve

    try:
        catalog = Catalog(path)
        fingerprint = catalog.fingerprint()
    except ReplayError as exc:
        return (f'<p class="note">Budget-response curves are omitted: the catalog '
                f"<code>{esc(path)}</code> cannot be opened ({esc(exc)}).</p>")
    if cat_info.get("fingerprint") and fingerprint != cat_info.get("fingerprint"):
        return (f'<p class="note">Budget-response curves are omitted: the catalog '
                f"<code>{esc(path)}</code> changed since the run (fingerprint "
                f"{esc(fingerprint)}, run used {esc(cat_info.get('fingerprint'))}).</p>")
    win = man.get("window") or {}
    start, end = to_us(win.get("start")), to_us(win.get("end"))
    row_of = {r["campaign_id"]: r for r in t.iter_rows(named=True)}
    data = []
    for i, cid in enumerate(chosen):
        r = row_of[cid]
        arrays = catalog.arrays(cid, start, end)
        if len(arrays) == 0 or not r.get("budget"):
            continue
        budgets = CURVE_SCALES * float(r["budget"])
        curve = budget_curve(arrays.value, arrays.min_win_price, budgets,
                             r.get("max_cost_per_result"))
        color = PALETTE[i % len(PALETTE)]
        name = _label(cid)
        data.append({"type": "scatter", "mode": "lines+markers", "x": _clean(list(budgets)),
                     "y": _clean([float(v) for v in curve["upper_bound"]]),
                     "name": f"{name} optimum", "legendgroup": name,
                     "line": {"color": color}, "marker": {"size": 5},
                     "hovertemplate": name + "<br>budget %{x:.4g}<br>optimum %{y:.4g} "
                                             "results<extra></extra>"})
        data.append({"type": "scatter", "mode": "markers", "x": [r["budget"]],
                     "y": _clean([r["results"]]), "name": f"{name} replayed",
                     "legendgroup": name,
                     "marker": {"color": color, "size": 11, "symbol": "diamond"},
                     "hovertemplate": name + "<br>replayed: budget %{x:.4g}, %{y:.4g} "
                                             "results<extra></extra>"})
        for label, other in others:
            o = other.filter(pl.col("campaign_id") == cid)
            if o.height:
                data.append({"type": "scatter", "mode": "markers",
                             "x": [o["budget"][0]], "y": _clean([o["results"][0]]),
                             "name": f"{name} {_label(label)}", "legendgroup": name,
                             "marker": {"color": color, "size": 10, "symbol": "x"},
                             "hovertemplate": name + " " + _label(label) +
                             "<br>%{y:.4g} results<extra></extra>"})
    if not data:
        return '<p class="note">No chosen campaign has rows in the replay window.</p>'
    layout = {"xaxis": {"title": {"text": "budget (currency)"}, "type": "log"},
              "yaxis": {"title": {"text": "results"}}}
    return charts.add(data, layout, height=420) + (
        '<p class="note">Lines: the hindsight optimum (LP bound) of each campaign for budgets '
        "from 0.25x to 4x its own, over the replay window; diamonds: what the replayed rule "
        "got with its budget. No rule can be above the line.</p>")


def _settings_table(run: Any, setting_id: int) -> str:
    t = run.totals
    if t.height == 0 or t["setting_id"].n_unique() < 2:
        return ""
    stats = (t.group_by("setting_id").agg(
        pl.col("relative_regret").mean().alias("mean"),
        pl.col("relative_regret").std().alias("std"),
        pl.col("relative_regret").median().alias("median"),
        pl.len().alias("n")).sort("mean", nulls_last=True))
    params = {}
    if run.settings.height:
        for r in run.settings.iter_rows(named=True):
            sid = r.get("setting_id")
            params[sid] = ", ".join(f"{k}={v}" for k, v in r.items() if k != "setting_id")
    rows = "".join(
        f"<tr{' class=shown' if r['setting_id'] == setting_id else ''}>"
        f"<td>{r['setting_id']}</td><td>{esc(params.get(r['setting_id'], ''))}</td>"
        f"<td>{_pct(r['mean'])}</td><td>{_pct(r['std'])}</td><td>{_pct(r['median'])}</td>"
        f"<td>{r['n']}</td></tr>" for r in stats.iter_rows(named=True))
    return ('<section id="settings"><h2>Settings of the sweep</h2>'
            '<table class="data"><thead><tr><th>setting</th><th>parameters</th>'
            "<th>mean relative regret</th><th>spread (std)</th><th>median</th>"
            f"<th>campaigns</th></tr></thead><tbody>{rows}</tbody></table>"
            f'<p class="note">Ranked by mean relative regret across campaigns; the rest of '
            f"this report shows setting {setting_id} (highlighted).</p></section>")


def _comparison_section(cmp_: Any, charts: _Charts) -> str:
    from replay.analysis.compare import BETTER, WORSE

    head = (f"<p>B = <b>{esc(cmp_.rule_b)}</b> (<code>{esc(cmp_.run_b)}</code>) against "
            f"A = <b>{esc(cmp_.rule_a)}</b> (<code>{esc(cmp_.run_a)}</code>).</p>")
    notes = "".join(f'<p class="note">{esc(n)}</p>' for n in cmp_.notes)
    notes += "".join(f'<p class="note alarm">forced: {esc(f)}</p>' for f in cmp_.forced)
    if cmp_.is_empty:
        return (f'<section id="comparison"><h2>Comparison with a second run</h2>{head}'
                f'<p class="empty">Nothing to compare: {esc(cmp_.empty_reason)}.</p>'
                f"{notes}</section>")
    pct = f"{cmp_.level * 100:g}%"
    rows = []
    for m in cmp_.metrics.values():
        cls = ("good" if m.verdict == BETTER else "bad" if m.verdict == WORSE else "")
        ci = ("&ndash;" if not math.isfinite(m.ci_low)
              else f"[{_num(m.ci_low)}, {_num(m.ci_high)}]")
        rows.append(
            f"<tr><td>{esc(m.metric.replace('_', ' '))}</td><td>{m.n}</td>"
            f"<td>{_num(m.mean_a)}</td><td>{_num(m.mean_b)}</td>"
            f"<td>{_num(m.mean_difference)}</td><td>{ci}</td><td>{esc(m.method)}</td>"
            f'<td class="{cls}">{esc(m.verdict)}</td><td>{esc(m.note or "")}</td></tr>')
    table = ('<table class="data"><thead><tr><th>metric</th><th>campaigns</th><th>mean A</th>'
             f"<th>mean B</th><th>mean B - A</th><th>{pct} interval</th><th>method</th>"
             f"<th>verdict for B</th><th>note</th></tr></thead><tbody>{''.join(rows)}"
             "</tbody></table>")
    per = cmp_.per_campaign.sort("results_diff")
    ids = [_label(c) for c in per["campaign_id"].to_list()]
    m = cmp_.metrics["results"]
    data = [{"type": "bar", "x": ids, "y": _clean(per["results_diff"].to_list()),
             "name": "B - A per campaign", "marker": {"color": PALETTE[0]},
             "hovertemplate": "%{x}<br>B - A: %{y:.4g} results<extra></extra>"}]
    shapes = []
    if math.isfinite(m.ci_low):
        shapes = [{"type": "rect", "xref": "paper", "x0": 0, "x1": 1, "yref": "y",
                   "y0": m.ci_low, "y1": m.ci_high, "fillcolor": PALETTE[1], "opacity": 0.2,
                   "layer": "below",
                   "line": {"width": 0}},
                  {"type": "line", "xref": "paper", "x0": 0, "x1": 1, "yref": "y",
                   "y0": m.mean_difference, "y1": m.mean_difference,
                   "line": {"color": PALETTE[1], "width": 2}}]
    layout = {"xaxis": {"type": "category", "title": {"text": "campaign"}, "tickangle": -40},
              "yaxis": {"title": {"text": "results, B - A"}}, "shapes": shapes,
              "showlegend": False}
    chart = charts.add(data, layout, height=380)
    verdict = cmp_.metrics[cmp_.metric].verdict
    return (f'<section id="comparison"><h2>Comparison with a second run</h2>{head}'
            f'<p class="verdict">On {esc(cmp_.metric.replace("_", " "))}, B is '
            f"<b>{esc(verdict)}</b> at {pct} ({len(cmp_.campaigns)} campaigns paired).</p>"
            f"{table}{chart}"
            f'<p class="note">Bars: per-campaign difference in results; band: the {pct} '
            "bootstrap interval of the mean difference (line). Intervals from "
            "scipy.stats.bootstrap over the per-campaign differences, campaigns resampled; "
            "lower regret and higher results count as better; spend has no better side."
            f"</p>{notes}</section>")


# --------------------------------------------------------------------------- the page

_CSS = """
:root{--ink:#1f2933;--muted:#5f6b76;--line:#dedbd3;--bg:#f6f5f1;--panel:#fff;
--accent:#2f6f73;--warn:#8a5a14;--warnbg:#fbf3e4}
*{box-sizing:border-box}
body{margin:0;background:var(--bg);color:var(--ink);font:14px/1.5 %FONT%}
main{max-width:1180px;margin:0 auto;padding:24px 28px 64px}
h1{font-size:22px;margin:0 0 12px;font-weight:600}
h2{font-size:17px;margin:0 0 10px;font-weight:600;color:var(--accent)}
header{border-bottom:3px solid var(--accent);padding-bottom:12px;margin-bottom:18px}
dl.meta{display:grid;grid-template-columns:max-content 1fr max-content 1fr;gap:2px 14px;
margin:0;font-size:12.5px}
dl.meta dt{color:var(--muted)} dl.meta dd{margin:0;word-break:break-all}
section{background:var(--panel);border:1px solid var(--line);border-radius:6px;
padding:16px 18px;margin:16px 0}
section.cautions{background:var(--warnbg);border-color:#e4c98f;border-left:6px solid #d19a3b}
section.cautions h2{color:var(--warn)} section.cautions li{margin:4px 0}
.alarm{color:#9b2c2c;font-weight:600}
.cards{display:flex;flex-wrap:wrap;gap:10px;margin-bottom:12px}
.card{border:1px solid var(--line);border-radius:6px;padding:8px 12px;min-width:150px;
background:#fbfbf9}
.card .k{font-size:11.5px;color:var(--muted)} .card .v{font-size:17px;font-weight:600}
.scroll{overflow-x:auto;max-height:520px;overflow-y:auto}
table.data{border-collapse:collapse;font-size:12.5px;width:100%}
table.data th{position:sticky;top:0;background:#eeede7;text-align:left;font-weight:600}
table.data th,table.data td{padding:4px 8px;border-bottom:1px solid var(--line);
white-space:nowrap}
table.data td:not(:first-child){font-variant-numeric:tabular-nums}
tr.shown td{background:#e8f1f1}
td.good{color:#2d6a2d;font-weight:600} td.bad{color:#9b2c2c;font-weight:600}
.note{color:var(--muted);font-size:12.5px;margin:6px 0}
.empty{font-size:15px;padding:12px;border:1px dashed var(--line);background:#fbfbf9}
.verdict{font-size:15px}
nav{font-size:12.5px;margin-bottom:8px} nav a{color:var(--accent);margin-right:12px}
code{font-family:ui-monospace,SFMono-Regular,Menlo,Consolas,monospace;font-size:12px}
footer{color:var(--muted);font-size:12px;margin-top:24px}
""".replace("%FONT%", FONT)

#: Runs first: records script errors and any alert() (there should be none) for the status.
_STATUS_JS = """
(function(){
  var st = {expected: 0, rendered: 0, failed: 0, errors: [], alerts: 0, done: false};
  window.__reportStatus = st;
  window.__publishStatus = function(){
    var el = document.getElementById('render-status');
    if (el) { el.textContent = JSON.stringify(st); }
    document.title = 'report ' + (st.done ? 'rendered ' : 'rendering ') + st.rendered + '/' +
      st.expected + ' charts, ' + st.errors.length + ' errors';
  };
  window.addEventListener('error', function(e){
    st.errors.push(String(e && e.message ? e.message : e)); window.__publishStatus();
  });
  window.alert = function(){ st.alerts += 1; st.errors.push('alert called');
    window.__publishStatus(); };
})();
"""

_RENDER_JS = """
(function(){
  var st = window.__reportStatus;
  var specs = JSON.parse(document.getElementById('report-charts').textContent);
  st.expected = specs.length;
  var config = {responsive: true, displaylogo: false, scrollZoom: false};
  var pending = specs.length;
  function settle(){ pending -= 1; if (pending <= 0) { st.done = true; }
    window.__publishStatus(); }
  if (typeof Plotly === 'undefined') { st.errors.push('plotly did not load'); st.done = true;
    window.__publishStatus(); return; }
  specs.forEach(function(s){
    try {
      Plotly.newPlot(s.id, s.data, s.layout, config).then(function(gd){
        if (gd && gd.querySelector('.main-svg')) { st.rendered += 1; } else { st.failed += 1; }
        settle();
      }, function(err){ st.failed += 1; st.errors.push(String(err)); settle(); });
    } catch (e) { st.failed += 1; st.errors.push(String(e)); settle(); }
  });
  if (specs.length === 0) { st.done = true; }
  window.__publishStatus();
})();
"""


def _plotly_js() -> str:
    import plotly.offline

    js = plotly.offline.get_plotlyjs()
    # Belt and braces: the library text must not end its own script element.
    return js.replace("</script", "<\\/script")


# One way to open a run and name it: the comparison's helpers serve the report too.
_open_run = _compare_open
_run_label = _compare_run_label


def _pick_campaigns(t: pl.DataFrame, campaigns: Sequence[str] | None) -> list[str]:
    ids = t["campaign_id"].to_list()
    if campaigns:
        known = set(ids)
        for c in campaigns:
            if c not in known:
                sample = ", ".join(sorted(ids)[:5])
                raise UsageError(f"campaign {c!r} is not in the run (it has {len(ids)} "
                                 f"campaigns, e.g. {sample})")
        return list(dict.fromkeys(campaigns))
    ranked = t.sort("regret", descending=True, nulls_last=True)
    return ranked["campaign_id"].head(DEFAULT_CHOSEN).to_list()


def render_report(run_a: Any, run_b: Any = None, *, campaigns: Sequence[str] | None = None,
                  setting_id: int = 0, level: float = 0.95, force: bool = False) -> str:
    """The report page as one HTML string (see :func:`write_report`)."""
    ra = _open_run(run_a)
    label = _run_label(ra)
    man = ra.manifest
    charts = _Charts()
    title = f"Backtest report: rule {man.get('rule')}"
    totals = ra.totals
    t = totals.filter(pl.col("setting_id") == setting_id) if totals.height else totals
    if totals.height and t.height == 0:
        sids = sorted(set(totals["setting_id"].to_list()))
        raise UsageError(f"run {label} has no setting_id {setting_id}; it has "
                         f"{', '.join(map(str, sids))}")
    parts = [_header(man, label, title), _cautions(man, t)]
    if t.height == 0:
        reason = ("the run has no campaign results: it selected no campaigns, or none "
                  "finished" + (f" (status {man.get('status')})"
                                if man.get("status") != "complete" else ""))
        parts.append(f'<section id="summary"><h2>Summary</h2><p class="empty">Nothing to '
                     f"show: {esc(reason)}.</p></section>")
    else:
        chosen = _pick_campaigns(t, campaigns)
        series = ra.series.filter(pl.col("setting_id") == setting_id) \
            if ra.series.height else ra.series
        plc = ra.placements.filter(pl.col("setting_id") == setting_id) \
            if ra.placements.height else ra.placements
        chosen_txt = ", ".join(f"<code>{esc(c)}</code>" for c in chosen)
        how = "chosen" if campaigns else "with the largest regret"
        others: list[tuple[str, pl.DataFrame]] = []
        cmp_html = ""
        if run_b is not None:
            from replay.analysis.compare import compare

            rb = _open_run(run_b)
            cmp_ = compare(ra, rb, level=level, force=force, setting_a=setting_id)
            cmp_html = _comparison_section(cmp_, charts)
            tb = rb.totals.filter(pl.col("setting_id") == 0) if rb.totals.height else rb.totals
            others.append((f"B: {rb.manifest.get('rule')}", tb))
        nav = ("<nav>" + "".join(f'<a href="#{a}">{esc(b)}</a>' for a, b in (
            ("summary", "summary"), ("distribution", "relative regret"),
            ("decomposition", "regret decomposition"), ("pacing", "pacing"),
            ("lambda", "multiplier paths"), ("placements", "placements"),
            ("curves", "budget response")) + ((("comparison", "comparison"),)
                                              if run_b is not None else ())) + "</nav>")
        parts.insert(1, nav)
        parts.append(f'<section id="summary"><h2>Summary</h2>{_cards(t)}'
                     f"{_summary_table(t)}</section>")
        if cmp_html:
            parts.append(cmp_html)
        parts.append(_settings_table(ra, setting_id))
        parts.append('<section id="distribution"><h2>Relative regret across campaigns</h2>'
                     f"{_regret_distribution(t, charts)}</section>")
        parts.append('<section id="decomposition"><h2>Where the regret comes from</h2>'
                     f"{_decomposition(t, charts)}</section>")
        parts.append(f'<section id="pacing"><h2>Cumulative spend against target</h2>'
                     f'<p class="note">Campaigns {how}: {chosen_txt}.</p>'
                     f"{_pacing(series, t, chosen, charts)}</section>")
        parts.append('<section id="lambda"><h2>Multiplier paths</h2>'
                     f"{_lambda_paths(series, t, chosen, charts)}</section>")
        parts.append('<section id="placements"><h2>Placement shares</h2>'
                     f"{_placements(plc, chosen, charts)}</section>")
        parts.append('<section id="curves"><h2>Budget-response curves</h2>'
                     f"{_curves(man, t, chosen, charts, others)}</section>")
    body = "\n".join(p for p in parts if p)
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{esc(title)}</title><style>{_CSS}</style>"
        f"<script>{_STATUS_JS}</script>"
        f"<script>{_plotly_js()}</script></head><body><main>\n{body}\n"
        '<footer>Written by auction-replay. Charts: drag to zoom, double-click to reset, '
        'hover for values. <span id="render-status" hidden></span></footer></main>'
        f'<script type="application/json" id="report-charts">{safe_json(charts.specs)}'
        f"</script><script>{_RENDER_JS}</script></body></html>\n")


def write_report(run_a: Any, run_b: Any = None, *, out: str | Path | None = None,
                 campaigns: Sequence[str] | None = None, setting_id: int = 0,
                 level: float = 0.95, force: bool = False) -> Path:
    """Write the self-contained HTML report of run A (with a comparison section against
    run B when given) and return its path (default ``RUN_A/report.html``).

    ``campaigns``: ids for the per-campaign charts (default: the few with the largest
    regret). ``level``: confidence level of the comparison. ``force``: compare runs over
    different catalogs or windows anyway.
    """
    page = render_report(run_a, run_b, campaigns=campaigns, setting_id=setting_id,
                         level=level, force=force)
    if out is None:
        base = getattr(run_a, "path", None) or getattr(run_a, "run_dir", None) or run_a
        out = Path(base) / "report.html"
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(out)
    return out
