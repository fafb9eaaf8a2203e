"""Paired comparison of two backtest runs over the campaigns both ran.

For every campaign present in both runs (one setting of each), the difference ``B - A`` of
results, spend, regret and relative regret; the mean difference with a bootstrap confidence
interval (``scipy.stats.bootstrap`` over the per-campaign differences, BCa with a seeded
generator, percentile when BCa cannot be computed on degenerate data); and a plain verdict
per metric at the chosen confidence level.

Campaigns are the unit of resampling: the interval says how sure we can be that the mean
per-campaign difference is not zero, given how much it varies across campaigns.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import scipy.stats

from replay.errors import ReplayError, UsageError

#: Metrics compared, in display order, and which direction is an improvement for run B.
#: ``+1``: higher is better; ``-1``: lower is better; ``0``: no preferred direction.
METRICS: dict[str, int] = {
    "results": +1,
    "spend": 0,
    "regret": -1,
    "relative_regret": -1,
}
METRIC_UNITS: dict[str, str] = {
    "results": "results",
    "spend": "currency",
    "regret": "results",
    "relative_regret": "share of the optimum",
}
BETTER = "better"
WORSE = "worse"
NO_DIFFERENCE = "no detectable difference"
HIGHER = "higher"
LOWER = "lower"
DEFAULT_RESAMPLES = 9999


@dataclass(frozen=True)
class MetricComparison:
    """Paired difference ``B - A`` of one metric over the common campaigns."""

    metric: str
    n: int  # campaigns with the metric known in both runs
    mean_a: float
    mean_b: float
    mean_difference: float  # mean over campaigns of (B - A), in the metric's unit
    ci_low: float  # NaN when no interval could be computed
    ci_high: float
    method: str  # "BCa", "percentile" or "none"
    verdict: str  # better | worse | no detectable difference (spend: higher | lower | ...)
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "metric": self.metric, "unit": METRIC_UNITS[self.metric], "n": self.n,
            "mean_a": _json_float(self.mean_a), "mean_b": _json_float(self.mean_b),
            "mean_difference": _json_float(self.mean_difference),
            "ci_low": _json_float(self.ci_low), "ci_high": _json_float(self.ci_high),
            "method": self.method, "verdict": self.verdict, "note": self.note,
        }


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare`. ``per_campaign`` has one row per common campaign."""

    run_a: str
    run_b: str
    rule_a: str
    rule_b: str
    setting_a: int
    setting_b: int
    level: float
    metric: str  # the headline metric whose verdict is ``verdict``
    campaigns: list[str]
    per_campaign: pl.DataFrame
    metrics: dict[str, MetricComparison]
    verdict: str  # verdict of ``metric``; "nothing to compare" when ``empty_reason`` is set
    empty_reason: str | None = None  # why nothing is shown (empty run, no common campaigns)
    notes: list[str] = field(default_factory=list)
    forced: list[str] = field(default_factory=list)  # differences overridden with force=True

    @property
    def is_empty(self) -> bool:
        return self.empty_reason is not None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (``replay compare --json``)."""
        return {
            "run_a": self.run_a, "run_b": self.run_b, "rule_a": self.rule_a,
            "rule_b": self.rule_b, "setting_a": self.setting_a, "setting_b": self.setting_b,
            "level": self.level, "metric": self.metric, "verdict": self.verdict,
            "campaigns": len(self.campaigns), "empty_reason": self.empty_reason,
            "notes": list(self.notes), "forced": list(self.forced),
            "metrics": [m.to_dict() for m in self.metrics.values()],
            "reference": "scipy.stats.bootstrap over per-campaign differences B - A",
        }

    def summary_text(self) -> str:
        """A few plain lines: what was compared and the verdict per metric."""
        head = (f"B = {self.rule_b} ({self.run_b}) against A = {self.rule_a} ({self.run_a})")
        if self.empty_reason is not None:
            return f"{head}\nnothing to compare: {self.empty_reason}"
        pct = _pct(self.level)
        lines = [head, f"{len(self.campaigns)} campaigns paired; mean difference B - A with "
                       f"{pct} bootstrap interval"]
        for m in self.metrics.values():
            if m.n == 0:
                lines.append(f"  {m.metric:<16} no campaign has it in both runs")
                continue
            ci = ("no interval" if math.isnan(m.ci_low)
                  else f"[{_fmt(m.ci_low)}, {_fmt(m.ci_high)}]")
            lines.append(f"  {m.metric:<16} {_fmt(m.mean_difference, signed=True):>12} {ci:<28}"
                         f" {m.verdict}" + (f" ({m.note})" if m.note else ""))
        head_metric = self.metrics[self.metric]
        lines.append(f"verdict on {self.metric}: B is {head_metric.verdict}"
                     if head_metric.verdict in (BETTER, WORSE)
                     else f"verdict on {self.metric}: {head_metric.verdict} at {pct}")
        lines.extend(f"note: {n}" for n in self.notes)
        lines.extend(f"forced: {f}" for f in self.forced)
        return "\n".join(lines)


def _json_float(x: float) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def _pct(level: float) -> str:
    return f"{level * 100:g}%"


def _fmt(x: float, signed: bool = False) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    text = f"{x:+.4g}" if signed else f"{x:.4g}"
    return text


def _open(run: Any) -> Any:
    """A run object from a path, or the object itself when it already is one."""
    if hasattr(run, "manifest") and hasattr(run, "totals"):
        return run
    # The run store is a plain file reader; imported late so importing this module stays cheap.
    from replay.runstore import open_run

    return open_run(Path(run))


def _run_label(run: Any) -> str:
    path = getattr(run, "path", None) or getattr(run, "run_dir", None)
    return str(path) if path is not None else f"run of rule {run.manifest.get('rule')}"


def _differences(manifest_a: dict, manifest_b: dict) -> list[str]:
    """What differs between the two runs' inputs (catalog, windows); empty when comparable."""
    out: list[str] = []
    fa = (manifest_a.get("catalog") or {}).get("fingerprint")
    fb = (manifest_b.get("catalog") or {}).get("fingerprint")
    if fa != fb:
        out.append(f"catalog fingerprint differs (A: {fa}, B: {fb})")
    wa = manifest_a.get("window") or {}
    wb = manifest_b.get("window") or {}
    for key in sorted(set(wa) | set(wb)):
        if wa.get(key) != wb.get(key):
            out.append(f"window.{key} differs (A: {wa.get(key)}, B: {wb.get(key)})")
    return out


def bootstrap_mean(differences: np.ndarray, level: float = 0.95, *, seed: int = 0,
                   n_resamples: int = DEFAULT_RESAMPLES) -> tuple[float, float, str, str | None]:
    """Bootstrap interval of the mean of paired differences.

    Returns ``(low, high, method, note)``. BCa with ``numpy.random.default_rng(seed)``;
    when BCa cannot be computed (for example all differences equal), the percentile
    interval with the same seed, and a note saying so. Fewer than two values: no interval.
    """
    d = np.asarray(differences, dtype=np.float64)
    if d.size < 2:
        return math.nan, math.nan, "none", "fewer than two campaigns: no interval"
    with warnings.catch_warnings():
        # scipy warns (DegenerateDataWarning, divide) when BCa is undefined; we fall back.
        warnings.simplefilter("ignore")
        res = scipy.stats.bootstrap((d,), np.mean, confidence_level=level,
                                    n_resamples=n_resamples, method="BCa",
                                    rng=np.random.default_rng(seed))
        low, high = float(res.confidence_interval.low), float(res.confidence_interval.high)
        if math.isfinite(low) and math.isfinite(high):
            return low, high, "BCa", None
        res = scipy.stats.bootstrap((d,), np.mean, confidence_level=level,
                                    n_resamples=n_resamples, method="percentile",
                                    rng=np.random.default_rng(seed))
    low, high = float(res.confidence_interval.low), float(res.confidence_interval.high)
    spread = "all differences are equal" if np.all(d == d[0]) else "degenerate data"
    return low, high, "percentile", f"BCa undefined ({spread}); percentile interval shown"


def verdict_for(metric: str, low: float, high: float) -> str:
    """The verdict for run B given the interval of ``B - A`` (see :data:`METRICS`)."""
    direction = METRICS[metric]
    if not (math.isfinite(low) and math.isfinite(high)) or low <= 0.0 <= high:
        return NO_DIFFERENCE
    up = low > 0.0
    if direction == 0:
        return HIGHER if up else LOWER
    return BETTER if up == (direction > 0) else WORSE


def compare(run_a: Any, run_b: Any, level: float = 0.95, force: bool = False,
            metric: str = "results", *, setting_a: int = 0, setting_b: int = 0,
            seed: int = 0, n_resamples: int = DEFAULT_RESAMPLES) -> Comparison:
    """Paired comparison of run B against run A over the campaigns both ran.

    ``run_a`` / ``run_b``: run directories (or opened runs). ``level``: confidence level in
    (0, 1). ``force``: compare even when catalogs or windows differ (listed in ``forced``).
    ``metric``: the headline metric of :attr:`Comparison.verdict`, one of :data:`METRICS`.
    Differences are ``B - A``. Raises ReplayError when the runs are not comparable.
    """
    if metric not in METRICS:
        raise UsageError(f"unknown metric {metric!r}; allowed: {', '.join(METRICS)}")
    if not (0.0 < level < 1.0):
        raise UsageError(f"level must be between 0 and 1 (exclusive), got {level}")
    ra, rb = _open(run_a), _open(run_b)
    label_a, label_b = _run_label(ra), _run_label(rb)
    man_a, man_b = ra.manifest, rb.manifest
    differs = _differences(man_a, man_b)
    if differs and not force:
        raise ReplayError(f"runs {label_a} and {label_b} are not comparable: "
                          f"{'; '.join(differs)}; pass --force to compare anyway")
    notes: list[str] = []
    for man, name in ((man_a, "A"), (man_b, "B")):
        if man.get("status") not in (None, "complete"):
            notes.append(f"run {name} is not complete (status {man.get('status')}); "
                         "only its finished campaigns are compared")

    ta = _setting(ra.totals, setting_a, "A", label_a)
    tb = _setting(rb.totals, setting_b, "B", label_b)

    def empty(reason: str) -> Comparison:
        return Comparison(label_a, label_b, str(man_a.get("rule")), str(man_b.get("rule")),
                          setting_a, setting_b, level, metric, [], pl.DataFrame(), {},
                          "nothing to compare", reason, notes, differs)

    if ta.height == 0 or tb.height == 0:
        which = " and ".join(n for n, t in (("A", ta), ("B", tb)) if t.height == 0)
        return empty(f"run {which} has no campaign results for the chosen setting "
                     "(the run selected no campaigns, or none finished)")
    cols = ["campaign_id", "budget", *METRICS]
    joined = ta.select(cols).join(tb.select(cols), on="campaign_id", how="inner",
                                  suffix="_b").sort("campaign_id")
    if joined.height == 0:
        return empty(f"the runs have no campaign in common (A ran {ta.height}, "
                     f"B ran {tb.height})")
    only_a = ta.height - joined.height
    only_b = tb.height - joined.height
    if only_a or only_b:
        notes.append(f"{joined.height} campaigns in common; {only_a} only in A and {only_b} "
                     "only in B are left out")
    budget_diff = joined.filter(
        (pl.col("budget") - pl.col("budget_b")).abs()
        > 1e-9 * pl.max_horizontal(pl.col("budget").abs(), pl.lit(1.0)))
    if budget_diff.height:
        notes.append(f"{budget_diff.height} common campaigns have different budgets in A and B")

    per = joined.select(
        "campaign_id",
        *[e for m in METRICS for e in (
            pl.col(m).alias(f"{m}_a"), pl.col(f"{m}_b"),
            (pl.col(f"{m}_b") - pl.col(m)).alias(f"{m}_diff"))],
    )
    results: dict[str, MetricComparison] = {}
    for m in METRICS:
        known = per.filter(pl.col(f"{m}_diff").is_not_null() & pl.col(f"{m}_diff").is_finite())
        d = known[f"{m}_diff"].to_numpy().astype(np.float64)
        if d.size == 0:
            results[m] = MetricComparison(m, 0, math.nan, math.nan, math.nan, math.nan,
                                          math.nan, "none", NO_DIFFERENCE,
                                          "no campaign has this metric in both runs")
            continue
        low, high, method, note = bootstrap_mean(d, level, seed=seed, n_resamples=n_resamples)
        if d.size < per.height:
            extra = f"{per.height - d.size} campaigns without {m} left out"
            note = extra if note is None else f"{note}; {extra}"
        results[m] = MetricComparison(
            m, int(d.size), float(known[f"{m}_a"].mean()), float(known[f"{m}_b"].mean()),
            float(d.mean()), low, high, method, verdict_for(m, low, high), note)
    return Comparison(label_a, label_b, str(man_a.get("rule")), str(man_b.get("rule")),
                      setting_a, setting_b, level, metric, per["campaign_id"].to_list(), per,
                      results, results[metric].verdict, None, notes, differs)


def _setting(totals: pl.DataFrame, setting_id: int, name: str, label: str) -> pl.DataFrame:
    if totals.height == 0:
        return totals
    ids = sorted(set(totals["setting_id"].to_list()))
    if setting_id not in ids:
        raise UsageError(f"run {name} ({label}) has no setting_id {setting_id}; "
                         f"it has {', '.join(map(str, ids))}")
    return totals.filter(pl.col("setting_id") == setting_id)
