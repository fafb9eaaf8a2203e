"""The local multi-campaign engine: ``backtest`` (a process pool over campaigns, optional
sweep grid, run store) and ``whatif`` (one campaign, current setting beside a changed one).

Per campaign (one task): load its rows once for the training and replay windows, solve the
hindsight optimum of the replay rows with the campaign's budget (times ``budget_scale``)
and cap, fit the shading landscape on the training rows once, then replay every setting
of the grid on those same arrays and compute the metrics (``replay.analysis.metrics``).

Windows and budget. The replay window is ``[start, end)`` (default: catalog start +
``train_days`` to the catalog end); a campaign's flight (``start``/``end`` of the campaign
table) clips it, and its default training window is the ``train_days`` before its own
replay start, so log rows before the flight are training data only. The campaign's whole
budget applies to its flight inside the replay window, without proration: a replay window
that covers half of a flight still gets the full budget (use ``budget_scale`` to prorate).

Determinism. Tasks are campaign ids; each campaign's seed is a stable hash of ``(seed,
campaign_id)`` (never of worker or completion order), the same for every setting (common
random numbers across the grid), and tables are sorted before writing, so any worker count
gives bit-identical tables.

Groups (campaigns sharing a ``group_id``): each member is replayed with its own rule
instance and its own budget row, against its own hindsight optimum (the totals rows). The
group's pooled optimum (shared budget = sum of the members' budgets, one win per request)
is reported beside the members' summed results per setting in the manifest, ``groups``.
"""

from __future__ import annotations

import hashlib
import math
import os
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import FIRST_EXCEPTION, ProcessPoolExecutor, wait
from dataclasses import dataclass, field, replace
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from replay.analysis.metrics import campaign_totals, placement_table
from replay.analysis.sweep import Setting, expand_grid, rank_settings, settings_table
from replay.engines.windows import (
    CampaignWindow,
    Windows,
    campaign_window,
    check_charges,
    check_schedule,
    compute_windows,
    format_duration,
    iso,
    normalize_sweep,
    parse_duration,
)
from replay.errors import ReplayError, UsageError
from replay.runstore import SORT_KEYS, RunStore, conform, jsonable, open_run
from replay.schema import CampaignArrays, CampaignSpec

SHADING_MODELS = ("empirical", "lognormal")
CAUTIONS = ("cautions: competitors' bids and reserves are held fixed as logged; "
            "{share} of bids were above the largest logged minimum winning price of their "
            "placement (extrapolation)")


# ----------------------------------------------------------------------------- jobs


def derive_seed(seed: int, campaign_id: str) -> int:
    """Stable per-campaign seed in [0, 2**32): blake2b of ``(seed, campaign_id)``."""
    digest = hashlib.blake2b(f"{int(seed)}\x1f{campaign_id}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") % (2**32)


@dataclass(frozen=True)
class Job:
    """Everything a worker needs besides the campaign (picklable)."""

    catalog_path: str
    rule: Any  # registry name / "module:Class" text, or a BidRule subclass
    settings: tuple[Setting, ...]
    windows: Windows
    budget_scale: float
    seed: int
    shading: str
    placements: tuple[tuple[str, str], ...]


@dataclass
class CampaignResult:
    """One campaign's tables (all settings) or the reason it was skipped."""

    campaign_id: str
    tables: dict[str, pl.DataFrame] = field(default_factory=dict)
    skipped: str | None = None


#: ``runner(job, specs, handle)``: runs ``run_campaign`` for every spec somewhere and calls
#: ``handle(CampaignResult)`` on this process for each (the process pool, or Spark).
Runner = Callable[[Job, Sequence[CampaignSpec], Callable[[CampaignResult], None]], None]


def _rule_class(rule: Any) -> Any:
    from replay.rules.base import BidRule
    from replay.rules.registry import get_rule

    if isinstance(rule, type) and issubclass(rule, BidRule):
        return rule
    if isinstance(rule, str):
        return get_rule(rule)
    raise UsageError(f"--rule {rule!r}: give a rule name or path.to.module:ClassName")


def _schedule(setting: Setting) -> Any:
    from replay.engines.campaign import Schedule

    if setting.every_n is not None:
        return Schedule(every_n=int(setting.every_n))
    return Schedule(every_us=parse_duration(setting.every or "15min", "--every"))


def _fit_landscape(train: CampaignArrays, placements: Sequence[tuple[str, str]],
                   shading: str) -> Any:
    if shading == "none":
        return None
    from replay.kernels.landscape import fit_shading

    return fit_shading(train.min_win_price, train.placement_code, list(placements),
                       model=shading)


def replay_settings(rows: CampaignArrays, train: CampaignArrays, spec: CampaignSpec,
                    cw: CampaignWindow, rule_cls: Any, settings: Sequence[Setting], *,
                    seed: int, shading: str,
                    placements: tuple[tuple[str, str], ...]) -> dict[str, pl.DataFrame]:
    """Replay every setting on one campaign's rows (pure: no I/O).

    ``rows`` are the replay-window rows, ``train`` the training rows, ``spec`` carries the
    budget (currency) and cap actually used. The hindsight optimum and the shading tables
    are computed once and shared by all settings. Returns the campaign's ``totals``,
    ``series`` and ``placements`` tables (columns of the run store).
    """
    from replay.engines.campaign import replay_campaign
    from replay.kernels.hindsight import solve

    budget = float(spec.budget)
    cap = spec.max_cost_per_result
    opt = solve(rows.value, rows.min_win_price, budget, cap, return_mask=True)
    tables = _fit_landscape(train, placements, shading)
    shade = shading if tables is not None else "none"
    tot, ser, plc = [], [], []
    opt_cache: dict = {}
    for s in settings:
        rule = rule_cls(**s.params)
        rep = replay_campaign(rows, train, spec, rule, _schedule(s), s.charges, seed=seed,
                              shading=shade, shading_tables=tables,
                              window=(cw.start_us, cw.end_us),
                              train_window=(cw.train_start_us, cw.train_end_us),
                              placements=placements)
        row = campaign_totals(rep, opt, budget=budget, cap=cap)
        row["setting_id"] = s.setting_id
        tot.append(row)
        ser.append(rep.series.with_columns(setting_id=pl.lit(s.setting_id, pl.Int32),
                                           campaign_id=pl.lit(spec.campaign_id)))
        p = placement_table(rows, rep.won, rep.placements, opt.taken, placements, opt_cache)
        plc.append(p.with_columns(setting_id=pl.lit(s.setting_id, pl.Int32),
                                  campaign_id=pl.lit(spec.campaign_id)))
    totals = pl.DataFrame(tot, infer_schema_length=None).with_columns(
        exhausted_at=pl.from_epoch(pl.col("exhausted_at_us").cast(pl.Int64), "us")
        .dt.replace_time_zone("UTC"))
    series = pl.concat(ser, how="diagonal_relaxed").with_columns(
        ts=pl.from_epoch(pl.col("ts_us"), "us").dt.replace_time_zone("UTC"))
    return {"totals": conform(totals, "totals"), "series": conform(series, "series"),
            "placements": conform(pl.concat(plc, how="diagonal_relaxed"), "placements")}


def run_campaign(arrays: CampaignArrays, spec: CampaignSpec, job: Job,
                 rule_cls: Any = None) -> CampaignResult:
    """One campaign task on its loaded rows (covering its training and replay windows)."""
    cid = spec.campaign_id
    cw = campaign_window(job.windows, spec)
    if cw.empty:
        return CampaignResult(cid, skipped=f"flight [{iso(spec.start_us)}, {iso(spec.end_us)}) "
                              "is outside the replay window")
    rows = arrays.window(cw.start_us, cw.end_us)
    if len(rows) == 0:
        return CampaignResult(cid, skipped="no logged auctions in its replay window "
                              f"[{iso(cw.start_us)}, {iso(cw.end_us)})")
    train = arrays.window(cw.train_start_us, min(cw.train_end_us, cw.start_us))
    run_spec = replace(spec, budget=float(spec.budget) * job.budget_scale)
    rule_cls = rule_cls if rule_cls is not None else _rule_class(job.rule)
    tables = replay_settings(rows, train, run_spec, cw, rule_cls, job.settings,
                             seed=derive_seed(job.seed, cid), shading=job.shading,
                             placements=job.placements)
    return CampaignResult(cid, tables)


def _load_and_run(catalog: Any, spec: CampaignSpec, job: Job, rule_cls: Any) -> CampaignResult:
    cw = campaign_window(job.windows, spec)
    if cw.empty:
        return run_campaign(_empty_arrays(spec.campaign_id), spec, job, rule_cls)
    arrays = catalog.arrays(spec.campaign_id, min(cw.train_start_us, cw.start_us), cw.end_us)
    return run_campaign(arrays, spec, job, rule_cls)


def _empty_arrays(cid: str) -> CampaignArrays:
    z = np.zeros(0)
    return CampaignArrays(cid, np.zeros(0, np.int64), z, z, z, np.zeros(0, np.int32),
                          np.zeros(0, np.bool_))


# Worker-process state: one Catalog and one job per process (set by the pool initializer).
_WORKER: dict[str, Any] = {}


def _init_worker(job: Job, catalog: Any) -> None:
    # One BLAS/numba thread per worker: the pool is the parallelism.
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    _WORKER["job"] = job
    # The parent's catalog, pickled with its snapshot of the files: every worker reads the
    # same rows even if an ingest commits during the backtest.
    _WORKER["catalog"] = catalog
    _WORKER["rule"] = _rule_class(job.rule)


def _worker_task(spec: CampaignSpec) -> CampaignResult:
    return _load_and_run(_WORKER["catalog"], spec, _WORKER["job"], _WORKER["rule"])


def _picklable_rule(rule: Any) -> bool:
    if isinstance(rule, str):
        return True
    module = getattr(rule, "__module__", "__main__")
    if module == "__main__" or module.startswith("replay_user_rule_"):
        return False
    try:
        import importlib

        return getattr(importlib.import_module(module), rule.__qualname__, None) is rule
    except Exception:  # noqa: BLE001 - any import failure means: keep it in this process
        return False


# ----------------------------------------------------------------------------- results


@dataclass
class BacktestResult:
    """A backtest's tables (polars) and, when written, its run folder."""

    run_dir: Path | None
    manifest: dict[str, Any]
    totals: pl.DataFrame
    series: pl.DataFrame
    placements: pl.DataFrame
    settings: pl.DataFrame

    @property
    def skipped(self) -> dict[str, str]:
        return dict(self.manifest.get("skipped") or {})

    def ranking(self) -> pl.DataFrame:
        """Settings ranked by mean relative regret (see ``replay.analysis.sweep``)."""
        return rank_settings(self.totals, self.settings)

    def records(self) -> list[dict[str, Any]]:
        """One JSON-ready object per (setting, campaign): ``campaign_id``, ``setting_id``,
        every totals column, ``optimum`` (the hindsight LP upper bound, results) and
        ``optimum_detail`` (upper_bound, results, spend, lambda of the optimum)."""
        labels = dict(zip(self.settings["setting_id"].to_list(),
                          self.settings["label"].to_list(), strict=True)) \
            if self.settings.height else {}
        out = []
        for row in self.totals.iter_rows(named=True):
            rec: dict[str, Any] = {"campaign_id": row["campaign_id"],
                                   "setting_id": row["setting_id"]}
            if len(labels) > 1:
                rec["setting"] = labels.get(row["setting_id"])
            for k, v in row.items():
                if k in ("campaign_id", "setting_id"):
                    continue
                rec[k] = v.isoformat().replace("+00:00", "Z") if hasattr(v, "isoformat") else v
            rec["optimum"] = row["opt_upper_bound"]
            rec["optimum_detail"] = {"upper_bound": row["opt_upper_bound"],
                                     "results": row["opt_results"], "spend": row["opt_spend"],
                                     "lambda": row["opt_lambda"]}
            out.append(jsonable(rec))
        return out

    def bids_above_logged(self) -> float:
        """Share of all bids above the logged range (bid-weighted mean is not stored; the
        campaign mean is the caution shown)."""
        if self.totals.height == 0:
            return 0.0
        x = self.totals["bids_above_logged"].drop_nulls()
        return float(x.mean()) if x.len() else 0.0


def _from_run(run: Any) -> BacktestResult:
    return BacktestResult(run.path, run.manifest, run.totals, run.series, run.placements,
                          run.settings)


# ----------------------------------------------------------------------------- backtest


def _select_campaigns(catalog: Any, campaigns: Sequence[str] | str | None
                      ) -> tuple[list[CampaignSpec], dict[str, str]]:
    specs = catalog.campaigns()
    in_log = set(catalog.campaign_ids())
    skipped: dict[str, str] = {}
    if campaigns is None or (not isinstance(campaigns, str) and len(campaigns) == 0):
        ids = sorted(in_log | set(specs))
        chosen = []
        for cid in ids:
            if cid not in specs:
                skipped[cid] = "no row in the campaign table (no budget)"
            elif cid not in in_log:
                skipped[cid] = "no logged auctions"
            else:
                chosen.append(specs[cid])
        if not chosen:
            raise UsageError(f"{catalog.path}: no campaign has both a campaign-table row and "
                             "logged auctions; nothing to backtest")
        return chosen, skipped
    wanted = [campaigns] if isinstance(campaigns, str) else list(campaigns)
    chosen = []
    for cid in dict.fromkeys(str(c) for c in wanted):
        if cid not in specs:
            known = sorted(specs)
            shown = ", ".join(known[:8]) + (", ..." if len(known) > 8 else "")
            raise UsageError(f"--campaign {cid!r}: not in the campaign table of "
                             f"{catalog.path}; known: {shown or 'none'}")
        chosen.append(specs[cid])
    return sorted(chosen, key=lambda s: s.campaign_id), skipped


def _rows_in_window(catalog: Any, ids: Sequence[str], start_us: int, end_us: int) -> int:
    """Logged rows of ``ids`` in ``[start_us, end_us)`` (one cheap DuckDB count)."""
    cur = catalog.con.execute(
        "SELECT count(*) FROM auctions WHERE epoch_us(ts) >= ? AND epoch_us(ts) < ? "
        "AND list_contains(?::VARCHAR[], campaign_id)",
        [int(start_us), int(end_us), list(ids)])
    return int(cur.fetchall()[0][0])


def _check_replay_options(every: str | None, every_n: int | None, charges: str,
                          shading: str) -> tuple[int | None, int | None, str | None, str]:
    """Validate the schedule (``every_n`` replaces ``every`` when given), charges and
    shading model; ``(every_us, every_n, every_text, charges)``."""
    if every_n is not None:
        every = None
    every_us, every_n = check_schedule(every, every_n)
    every_text = None if every_us is None else format_duration(every_us)
    charges = check_charges(charges)
    if shading not in SHADING_MODELS:
        raise UsageError(f"--shading {shading!r}: allowed: {'|'.join(SHADING_MODELS)}")
    return every_us, every_n, every_text, charges


def _resolve_workers(workers: int | None, n_tasks: int) -> int:
    if workers is None or workers == 0:
        workers = os.cpu_count() or 1
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
        raise UsageError(f"--workers {workers!r}: must be an integer >= 0 (0 = one per core)")
    return max(1, min(int(workers), max(n_tasks, 1)))


def backtest(catalog: Any, rule: Any, params: Mapping[str, Any] | None = None, *,
             campaigns: Sequence[str] | str | None = None, start: Any = None, end: Any = None,
             train_days: float = 1.0, train_start: Any = None, train_end: Any = None,
             every: str | None = "15min", every_n: int | None = None,
             charges: str = "expected", seed: int = 0, out: str | Path | None = None,
             sweep: Mapping[str, Sequence[Any]] | None = None, workers: int | None = None,
             resume: bool = False, budget_scale: float = 1.0, shading: str = "empirical",
             runner: Runner | None = None,
             on_campaign: Callable[[str], None] | None = None) -> BacktestResult:
    """Backtest ``rule`` over the selected campaigns of ``catalog`` (a Catalog or its path).

    ``params``: rule parameters (values or ``--set`` strings); ``sweep``: axis -> values
    (rule parameters, ``every``, ``every_n``, ``charges``), run as a cartesian grid.
    ``every``: update interval of log time (e.g. ``"15min"``); ``every_n`` (requests per
    update) replaces it when given. ``budget_scale`` multiplies every budget. ``out``: the
    run folder (None: nothing written). ``resume``: finish the unfinished run in ``out``.
    ``workers``: processes (None or 0: one per core; 1: in this process).
    ``on_campaign(campaign_id)`` is called after each campaign is stored (progress hook).
    ``runner(job, specs, handle)``: runs the per-campaign tasks elsewhere instead of the
    process pool (the Spark engine passes one); ``workers`` is then unused.
    """
    from replay.catalog import Catalog

    cat = catalog if isinstance(catalog, Catalog) else Catalog(catalog)
    rule_cls = _rule_class(rule)
    base_params = {k: _convert(rule_cls, k, v) for k, v in dict(params or {}).items()}
    every_us, every_n, every_text, charges = _check_replay_options(every, every_n, charges,
                                                                   shading)
    if isinstance(budget_scale, bool) or not isinstance(budget_scale, int | float) or \
            not math.isfinite(budget_scale) or budget_scale <= 0:
        raise UsageError(f"--budget-scale {budget_scale!r}: must be a number > 0 (multiplies "
                         "every campaign budget)")
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer):
        raise UsageError(f"--seed {seed!r}: must be an integer")
    axes = normalize_sweep(sweep, rule_cls)
    settings = expand_grid(axes, params=base_params, every=every_text, every_n=every_n,
                           charges=charges)
    for s in settings:  # every grid point must build (clear error before any work)
        rule_cls(**s.params)
        _schedule(s)
    if resume and out is None:
        raise UsageError("--resume needs --out RUN_DIR (the run to finish)")

    windows = compute_windows(cat.time_span_us(), start=start, end=end, train_days=train_days,
                              train_start=train_start, train_end=train_end)
    specs, pre_skipped = _select_campaigns(cat, campaigns)
    if _rows_in_window(cat, [s.campaign_id for s in specs], windows.start_us,
                       windows.end_us) == 0:
        raise UsageError(f"empty replay window: no auction of the selected campaigns in "
                         f"[{iso(windows.start_us)}, {iso(windows.end_us)}); choose another "
                         "--start/--end or --campaign")
    groups: dict[str, list[str]] = {}
    for s in specs:
        if s.group_id is not None:
            groups.setdefault(s.group_id, []).append(s.campaign_id)

    rule_name = rule if isinstance(rule, str) else \
        f"{rule_cls.__module__}:{rule_cls.__qualname__}"
    manifest = {
        "rule": rule_name, "params": base_params, "sweep": axes,
        "catalog": {"path": str(cat.path.resolve()), "fingerprint": cat.fingerprint()},
        "window": windows.to_manifest(),
        "schedule": ({"every_n": every_n} if every_n is not None
                     else {"every_seconds": every_us / 1e6}),
        "charges": charges, "seed": int(seed),
        "campaigns": [s.campaign_id for s in specs],
        "budget_scale": float(budget_scale), "shading": shading,
        "train_days": float(train_days),
        "groups": {g: {"members": m} for g, m in sorted(groups.items())},
    }
    job = Job(str(cat.path), rule if _picklable_rule(rule) else None, tuple(settings), windows,
              float(budget_scale), int(seed), shading, tuple(cat.placements()))

    store = RunStore.create(out, manifest, resume=resume) if out is not None else None
    if store is not None and store.complete:
        return _from_run(open_run(store.path))
    memory: dict[str, CampaignResult] = {}
    for cid, why in pre_skipped.items():
        memory[cid] = CampaignResult(cid, skipped=why)
        if store is not None and not store.is_done(cid):
            store.write_campaign(cid, {}, skipped=why)

    def handle(res: CampaignResult) -> None:
        if store is not None:
            store.write_campaign(res.campaign_id, res.tables, skipped=res.skipped)
        else:
            memory[res.campaign_id] = res
        if on_campaign is not None:
            on_campaign(res.campaign_id)

    todo = [s for s in specs if store is None or not store.is_done(s.campaign_id)]
    n_workers = _resolve_workers(workers, len(todo))
    if job.rule is None:
        n_workers = 1  # a rule class that other processes cannot import runs here
    if runner is not None:
        runner(job, todo, handle)
    elif n_workers <= 1 or len(todo) <= 1:
        for spec in todo:
            handle(_load_and_run(cat, spec, job, rule_cls))
    else:
        counts = cat.campaign_row_counts()
        # Largest first, so the pool is not left waiting on one big campaign at the end.
        ordered = sorted(todo, key=lambda s: (-counts.get(s.campaign_id, 0), s.campaign_id))
        _run_pool(job, cat, ordered, n_workers, handle)

    settings_df = settings_table(settings)
    if store is not None:
        tables = store.tables()
    else:
        parts = [r for r in memory.values() if not r.skipped]
        tables = {}
        for name in ("totals", "series", "placements"):
            frames = [conform(r.tables[name], name) for r in parts]
            df = pl.concat(frames) if frames else conform(None, name)
            tables[name] = df.sort(SORT_KEYS[name], maintain_order=True)
    group_rows = group_optima(cat, specs, groups, windows, float(budget_scale),
                              tables["totals"])
    extra = {"groups": group_rows}
    if store is not None:
        return _from_run(store.finish(settings_df, extra))
    manifest = {**manifest, **extra,
                "skipped": {c: r.skipped for c, r in sorted(memory.items()) if r.skipped},
                "status": "complete"}
    return BacktestResult(None, jsonable(manifest), tables["totals"], tables["series"],
                          tables["placements"], settings_df)


def group_optima(cat: Any, specs: Sequence[CampaignSpec], groups: Mapping[str, list[str]],
                 windows: Windows, budget_scale: float,
                 totals: pl.DataFrame) -> dict[str, dict[str, Any]]:
    """Per group (two or more selected members): the pooled hindsight optimum under the
    shared budget (sum of the members' budgets, at most one win per request;
    ``replay.analysis.hindsight``) beside the members' summed replay per setting.

    The members were replayed individually, each with its own rule instance and budget,
    so the group regret compares independent pacing with the best pooled allocation."""
    from replay.analysis.hindsight import solve_campaign_arrays

    by_id = {s.campaign_id: s for s in specs}
    out: dict[str, dict[str, Any]] = {}
    for gid, members in sorted(groups.items()):
        entry: dict[str, Any] = {"members": list(members)}
        if len(members) < 2:
            entry["note"] = "one selected member: its own optimum is the group optimum"
            out[gid] = entry
            continue
        parts = []
        for cid in members:
            cw = campaign_window(windows, by_id[cid])
            parts.append(cat.arrays(cid, cw.start_us, cw.end_us, request_ids=True) if not cw.empty
                         else _empty_arrays(cid))
        budget = sum(float(by_id[c].budget) for c in members)
        row = solve_campaign_arrays(parts, CampaignSpec(gid, budget), budget_scale=budget_scale)
        if row.get("error"):
            entry["note"] = str(row["error"])
            out[gid] = entry
            continue
        ub = float(row["upper_bound"])
        entry.update({"budget": float(row["budget"]), "opt_upper_bound": ub,
                      "opt_results": float(row["results"]), "opt_spend": float(row["spend"]),
                      "opt_lambda": float(row["lambda"])})
        mine = totals.filter(pl.col("campaign_id").is_in(list(members)))
        per = (mine.group_by("setting_id").agg(pl.col("results").sum(), pl.col("spend").sum())
               .sort("setting_id"))
        entry["settings"] = [
            {"setting_id": int(r["setting_id"]), "results": float(r["results"]),
             "spend": float(r["spend"]), "regret": ub - float(r["results"]),
             "relative_regret": (ub - float(r["results"])) / ub if ub > 0 else None}
            for r in per.iter_rows(named=True)]
        out[gid] = entry
    return out


def _run_pool(job: Job, catalog: Any, specs: Sequence[CampaignSpec], n_workers: int,
              handle: Callable[[CampaignResult], None]) -> None:
    # spawn: a forked child would inherit the parent's DuckDB threads and numba state.
    ctx = get_context("spawn")
    with ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx, initializer=_init_worker,
                             initargs=(job, catalog)) as pool:
        pending = {pool.submit(_worker_task, spec) for spec in specs}
        try:
            while pending:
                done, pending = wait(pending, return_when=FIRST_EXCEPTION)
                for fut in done:
                    handle(fut.result())
        except BaseException:
            for fut in pending:
                fut.cancel()
            raise


def _convert(rule_cls: Any, key: str, value: Any) -> Any:
    from replay.engines.windows import convert_param

    return convert_param(rule_cls, str(key).replace("-", "_"), value)


# ----------------------------------------------------------------------------- whatif


@dataclass
class WhatIfResult:
    """One campaign replayed with its current setting (``baseline``) and a changed one.

    ``baseline``/``changed``: the totals row of each side (run-store columns) plus
    ``optimum`` (hindsight LP upper bound, results) and the setting that produced it.
    ``table``: metric, baseline, changed, change (changed - baseline).
    """

    campaign_id: str
    baseline: dict[str, Any]
    changed: dict[str, Any]
    table: pl.DataFrame
    series: dict[str, pl.DataFrame]
    placements: dict[str, pl.DataFrame]

    def to_dict(self) -> dict[str, Any]:
        return jsonable({"campaign_id": self.campaign_id, "baseline": self.baseline,
                         "changed": self.changed})


WHATIF_METRICS = ("budget", "max_cost_per_result", "auctions", "wins", "results", "spend",
                  "cost_per_result", "budget_used", "cap_violated", "optimum", "opt_spend",
                  "opt_lambda", "regret", "relative_regret", "regret_unspent",
                  "regret_overpayment", "regret_misallocation", "regret_cap_slack",
                  "pacing_error_max",
                  "lambda_final", "bids_above_logged", "exhausted_at")


def _parse_cap(cap: Any, current: float | None) -> float | None:
    if cap is None:
        return current
    if isinstance(cap, str):
        text = cap.strip().lower()
        if text in ("none", "off"):
            return None
        try:
            cap = float(text)
        except ValueError:
            raise UsageError(f"--cap {cap!r}: must be a number > 0 (currency per result) or "
                             "'none' to remove the cap") from None
    if isinstance(cap, bool) or not isinstance(cap, int | float) or not math.isfinite(cap) \
            or cap <= 0:
        raise UsageError(f"--cap {cap!r}: must be a number > 0 (currency per result) or "
                         "'none' to remove the cap")
    return float(cap)


def _drop_placements(arrays: CampaignArrays, codes: np.ndarray) -> CampaignArrays:
    if codes.size == 0:
        return arrays
    keep = ~np.isin(arrays.placement_code, codes)
    return CampaignArrays(
        arrays.campaign_id, arrays.ts_us[keep], arrays.value[keep],
        arrays.min_win_price[keep], arrays.charge_prob[keep], arrays.placement_code[keep],
        arrays.first_price[keep], arrays.placements,
        None if arrays.request_id is None else arrays.request_id[keep])


def whatif(catalog: Any, campaign_id: str, *, budget: float | None = None,
           cap: float | str | None = None, rule: Any = None,
           params: Mapping[str, Any] | None = None, exclude_placements: Sequence[str] = (),
           baseline_rule: Any = "dual-mirror",
           baseline_params: Mapping[str, Any] | None = None, start: Any = None,
           end: Any = None, train_days: float = 1.0, train_start: Any = None,
           train_end: Any = None, every: str | None = "15min", every_n: int | None = None,
           charges: str = "expected", seed: int = 0,
           shading: str = "empirical") -> WhatIfResult:
    """Replay ``campaign_id`` with its catalog settings and ``baseline_rule`` (default
    ``dual-mirror`` with default parameters), and again with the changes: ``budget``
    (currency over the flight), ``cap`` (currency per result; ``"none"`` removes it),
    ``rule``/``params`` (default: the baseline rule with ``params`` applied) and
    ``exclude_placements`` (those placements' rows are neither bid on nor in the optimum).
    Each side is compared with the hindsight optimum of its own rows, budget and cap."""
    from replay.catalog import Catalog

    cat = catalog if isinstance(catalog, Catalog) else Catalog(catalog)
    specs = cat.campaigns()
    if campaign_id not in specs:
        known = sorted(specs)
        shown = ", ".join(known[:8]) + (", ..." if len(known) > 8 else "")
        raise UsageError(f"--campaign {campaign_id!r}: not in the campaign table of "
                         f"{cat.path}; known: {shown or 'none'}")
    spec = specs[campaign_id]
    base_cls = _rule_class(baseline_rule)
    new_cls = _rule_class(rule) if rule is not None else base_cls
    base_p = {k: _convert(base_cls, k, v) for k, v in dict(baseline_params or {}).items()}
    new_p = {k: _convert(new_cls, k, v) for k, v in dict(params or {}).items()}
    if rule is None:
        new_p = {**base_p, **new_p}
    if budget is not None and (isinstance(budget, bool) or not isinstance(budget, int | float)
                               or not math.isfinite(budget) or budget <= 0):
        raise UsageError(f"--budget {budget!r}: must be a number > 0 (currency over the flight)")
    new_cap = _parse_cap(cap, spec.max_cost_per_result)
    names = [p for p, _ in cat.placements()]
    unknown = [p for p in exclude_placements if p not in names]
    if unknown:
        raise UsageError(f"--exclude-placement {unknown[0]!r}: unknown placement; allowed: "
                         f"{', '.join(sorted(set(names)))}")
    drop = np.array([i for i, p in enumerate(names) if p in set(exclude_placements)], np.int32)
    every_us, every_n, every_text, charges = _check_replay_options(every, every_n, charges,
                                                                   shading)

    windows = compute_windows(cat.time_span_us(), start=start, end=end, train_days=train_days,
                              train_start=train_start, train_end=train_end)
    cw = campaign_window(windows, spec)
    if cw.empty:
        raise UsageError(f"campaign {campaign_id}: its flight does not overlap the replay "
                         f"window [{iso(windows.start_us)}, {iso(windows.end_us)})")
    arrays = cat.arrays(campaign_id, min(cw.train_start_us, cw.start_us), cw.end_us)
    rows = arrays.window(cw.start_us, cw.end_us)
    train = arrays.window(cw.train_start_us, min(cw.train_end_us, cw.start_us))
    if len(rows) == 0:
        raise UsageError(f"campaign {campaign_id}: empty replay window, no logged auctions in "
                         f"[{iso(cw.start_us)}, {iso(cw.end_us)})")
    new_rows, new_train = _drop_placements(rows, drop), _drop_placements(train, drop)
    if len(new_rows) == 0:
        raise UsageError(f"campaign {campaign_id}: excluding {', '.join(exclude_placements)} "
                         "leaves no auctions in the replay window")
    placements = tuple(cat.placements())
    cseed = derive_seed(seed, campaign_id)
    sides = {}
    for side, cls, p, b, c, r, t in (
            ("baseline", base_cls, base_p, spec.budget, spec.max_cost_per_result, rows, train),
            ("changed", new_cls, new_p, spec.budget if budget is None else float(budget),
             new_cap, new_rows, new_train)):
        s = Setting(0, {}, p, every_text, every_n, charges)
        side_spec = replace(spec, budget=float(b), max_cost_per_result=c)
        sides[side] = (replay_settings(r, t, side_spec, cw, cls, [s], seed=cseed,
                                       shading=shading, placements=placements), cls, p)
    out: dict[str, dict[str, Any]] = {}
    for side, (tables, cls, p) in sides.items():
        row = tables["totals"].drop("setting_id").row(0, named=True)
        row = {k: (v.isoformat().replace("+00:00", "Z") if hasattr(v, "isoformat") else v)
               for k, v in row.items()}
        row["optimum"] = row["opt_upper_bound"]
        row["rule"] = getattr(cls, "name", str(cls))
        row["params"] = p
        row["excluded_placements"] = list(exclude_placements) if side == "changed" else []
        out[side] = jsonable(row)
    table_rows = []
    for m in WHATIF_METRICS:
        a, b = out["baseline"].get(m), out["changed"].get(m)
        change = (b - a) if (isinstance(a, int | float) and isinstance(b, int | float)
                             and not isinstance(a, bool) and not isinstance(b, bool)) else None
        table_rows.append({"metric": m, "baseline": _show(a), "changed": _show(b),
                           "change": None if change is None else f"{change:+.6g}"})
    table = pl.DataFrame(table_rows, schema={"metric": pl.String, "baseline": pl.String,
                                             "changed": pl.String, "change": pl.String})
    return WhatIfResult(campaign_id, out["baseline"], out["changed"], table,
                        {k: v[0]["series"] for k, v in sides.items()},
                        {k: v[0]["placements"] for k, v in sides.items()})


def _show(x: Any) -> str | None:
    if x is None:
        return None
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, float):
        return f"{x:.6g}"
    return str(x)


__all__ = ["BacktestResult", "CAUTIONS", "CampaignResult", "Job", "ReplayError",
           "WhatIfResult", "backtest", "derive_seed", "replay_settings", "run_campaign",
           "whatif"]
