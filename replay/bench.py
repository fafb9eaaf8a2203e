"""``replay bench``: speed and peak memory of every kernel on this machine.

Each case runs in a fresh child process (so its peak RSS is its own), on seeded synthetic
campaigns built in memory, and reports the median of several timed runs after a warm-up.
Every case is also given as a fraction of the *reference pass*: one numba pass over the
same columns (read value and min_win_price, compare with a bid, accumulate spend), the
fastest any threshold rule could go here. That fraction compares across machines.

JSON keys are stable and documented in DEVELOPERS.md ("Benchmarks").
"""

from __future__ import annotations

import contextlib
import os
import platform
import resource
import statistics
import tempfile
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np

BENCH_FORMAT_VERSION = 1
#: Schedules every built-in rule is timed at (see replay.bench_rules): every 15 min of log
#: time, every 1,000 requests, after every request.
RULE_SCHEDULES = ("batch", "every_1000", "per_request")


@dataclass(frozen=True)
class BenchConfig:
    """Sizes of one bench run (rows per campaign)."""

    rows: int = 10_000_000
    ingest_rows: int = 5_000_000
    repeats: int = 5
    seed: int = 11
    #: Run all cases in one child process (quick mode): faster, but peak RSS is then the
    #: running maximum over the cases so far, not each case's own.
    shared_process: bool = False
    #: Rows of the ``--large`` cases: hindsight at this size and a backtest over a catalog
    #: of ``large_campaigns`` campaigns holding this many rows in all.
    large_rows: int = 100_000_000
    large_campaigns: int = 100
    #: Series rows kept per rule replay (None: the engine's default). Quick mode keeps one
    #: per update, so every-request cases run without the per-request stretch and its loop
    #: build is not compiled (about 9 s per rule): quick checks the command, not speed.
    series_max: int | None = None

    @classmethod
    def quick(cls) -> BenchConfig:
        return cls(rows=200_000, ingest_rows=100_000, repeats=2, shared_process=True,
                   large_rows=200_000, large_campaigns=2, series_max=200_000)


def _peak_rss_mb() -> float:
    # ru_maxrss is in kilobytes on Linux.
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _median_seconds(fn: Callable[[], object], repeats: int, warmup: int = 1) -> float:
    for _ in range(warmup):
        fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def _result(rows: int, seconds: float, **extra: object) -> dict[str, object]:
    return {
        "rows": int(rows),
        "seconds": float(seconds),
        "rows_per_s": float(rows / seconds) if seconds > 0 else None,
        "peak_rss_mb": _peak_rss_mb(),
        **extra,
    }


# --------------------------------------------------------------------------- cases
# Each case runs in its own child process and returns a dict from _result().


def _case_reference(cfg: BenchConfig) -> dict[str, object]:
    from replay.kernels.reference import reference_pass
    from replay.scenario import synthetic_campaign

    arrays = synthetic_campaign(cfg.rows, seed=cfg.seed)
    multiplier = float(np.median(arrays.min_win_price / np.maximum(arrays.value, 1e-12)))
    seconds = _median_seconds(
        lambda: reference_pass(arrays.value, arrays.min_win_price, multiplier), cfg.repeats
    )
    return _result(len(arrays), seconds)


def _log_table(arrays: Any, campaign_id: str, first_request: int = 0) -> Any:
    """A synthetic campaign as an auction-log table (data/SCHEMA.md columns)."""
    import pyarrow as pa

    placements = np.array(arrays.placements, dtype=object)
    n = len(arrays)
    return pa.table({
        "ts": pa.array(arrays.ts_us, pa.timestamp("us", tz="UTC")),
        "campaign_id": pa.array(np.full(n, campaign_id, dtype=object), pa.string()),
        "placement": pa.array(placements[arrays.placement_code], pa.string()),
        "pricing": pa.array(np.where(arrays.first_price, "first_price", "second_price"),
                            pa.string()),
        "value": arrays.value,
        "min_win_price": arrays.min_win_price,
        "request_id": pa.array(np.char.add("r", np.arange(first_request, first_request + n)
                                           .astype(str)), pa.string()),
        "charge_prob": arrays.charge_prob,
    })


def _write_ingest_inputs(cfg: BenchConfig, folder: Path) -> tuple[Path, Path, Path]:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from replay.scenario import synthetic_campaign

    arrays = synthetic_campaign(cfg.ingest_rows, seed=cfg.seed, campaign_id="bench")
    table = _log_table(arrays, "bench")
    parquet_path = folder / "bench.parquet"
    csv_path = folder / "bench.csv"
    pq.write_table(table, parquet_path)
    pacsv.write_csv(table, csv_path)
    campaigns_path = folder / "campaigns.csv"
    campaigns_path.write_text("campaign_id,budget\nbench,1000\n")
    return parquet_path, csv_path, campaigns_path


def _case_ingest(cfg: BenchConfig, fmt: str) -> dict[str, object]:
    import shutil

    from replay.ingest import ingest

    with tempfile.TemporaryDirectory(prefix="replay-bench-") as tmp:
        folder = Path(tmp)
        parquet_path, csv_path, campaigns_path = _write_ingest_inputs(cfg, folder)
        source = parquet_path if fmt == "parquet" else csv_path
        counter = iter(range(10_000))

        def run() -> None:
            target = folder / f"catalog{next(counter)}"
            ingest([source], target, campaigns=campaigns_path)
            shutil.rmtree(target)

        seconds = _median_seconds(run, max(1, min(cfg.repeats, 3)), warmup=0)
    return _result(cfg.ingest_rows, seconds, format=fmt)


def _case_catalog_scan(cfg: BenchConfig) -> dict[str, object]:
    from replay.catalog import Catalog
    from replay.ingest import ingest

    with tempfile.TemporaryDirectory(prefix="replay-bench-") as tmp:
        folder = Path(tmp)
        parquet_path, _, campaigns_path = _write_ingest_inputs(cfg, folder)
        ingest([parquet_path], folder / "catalog", campaigns=campaigns_path)
        catalog = Catalog(folder / "catalog")
        seconds = _median_seconds(lambda: catalog.arrays("bench"), cfg.repeats)
    return _result(cfg.ingest_rows, seconds)


def _case_hindsight(cfg: BenchConfig) -> dict[str, object]:
    from replay.kernels.hindsight import solve
    from replay.scenario import synthetic_campaign

    arrays = synthetic_campaign(cfg.rows, seed=cfg.seed)
    budget = 0.3 * float(arrays.min_win_price.sum())
    seconds = _median_seconds(
        lambda: solve(arrays.value, arrays.min_win_price, budget), cfg.repeats
    )
    return _result(len(arrays), seconds)


def _case_hindsight_rows(cfg: BenchConfig, rows: int) -> dict[str, object]:
    cfg = BenchConfig(rows=rows, repeats=max(1, min(cfg.repeats, 3)), seed=cfg.seed)
    return _case_hindsight(cfg)


class _TreeMemory:
    """Peak summed RSS (MiB) of this process and its children, sampled every 0.1 s (a
    process pool's workers hold memory at the same time, so one ru_maxrss is not enough)."""

    def __init__(self) -> None:
        import threading

        self.peak_mb = 0.0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, daemon=True)

    def _watch(self) -> None:
        import psutil

        me = psutil.Process()
        while not self._stop.is_set():
            total = 0
            for proc in [me, *me.children(recursive=True)]:
                with contextlib.suppress(psutil.Error):  # a worker that just exited
                    total += proc.memory_info().rss
            self.peak_mb = max(self.peak_mb, total / 2**20)
            self._stop.wait(0.1)

    def __enter__(self) -> _TreeMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()


def _case_backtest_large(cfg: BenchConfig) -> dict[str, object]:
    """Ingest ``large_rows`` rows of ``large_campaigns`` synthetic campaigns, then time one
    backtest over all of them (2 workers) with the peak memory of the whole process tree."""
    import pyarrow.parquet as pq

    from replay.catalog import Catalog
    from replay.engines.local import backtest
    from replay.ingest import ingest
    from replay.scenario import synthetic_campaign

    n_camp = max(1, cfg.large_campaigns)
    per = max(1000, cfg.large_rows // n_camp)
    with tempfile.TemporaryDirectory(prefix="replay-bench-") as tmp:
        folder = Path(tmp)
        budgets = []
        files = []
        for c in range(n_camp):
            cid = f"bench_{c:04d}"
            arrays = synthetic_campaign(per, seed=cfg.seed + c, campaign_id=cid)
            budgets.append((cid, 0.3 * float(arrays.min_win_price.sum())))
            path = folder / f"log_{c:04d}.parquet"
            pq.write_table(_log_table(arrays, cid, c * per), path)
            files.append(path)
            del arrays
        campaigns = folder / "campaigns.csv"
        campaigns.write_text("campaign_id,budget\n" +
                             "".join(f"{cid},{b!r}\n" for cid, b in budgets))
        t0 = time.perf_counter()
        ingest(files, folder / "catalog", campaigns=campaigns)
        ingest_s = time.perf_counter() - t0
        for path in files:
            path.unlink()
        catalog = Catalog(folder / "catalog")
        rows = catalog.row_count()
        with _TreeMemory() as mem:
            t0 = time.perf_counter()
            backtest(catalog, "dual-mirror", out=folder / "run", workers=2)
            seconds = time.perf_counter() - t0
    return _result(rows, seconds, campaigns=n_camp, workers=2, ingest_seconds=ingest_s,
                   peak_tree_rss_mb=mem.peak_mb)


def _case_hindsight_curve(cfg: BenchConfig) -> dict[str, object]:
    from replay.kernels.hindsight import budget_curve
    from replay.scenario import synthetic_campaign

    arrays = synthetic_campaign(cfg.rows, seed=cfg.seed)
    base = 0.3 * float(arrays.min_win_price.sum())
    budgets = base * np.geomspace(0.25, 4.0, 16)
    seconds = _median_seconds(
        lambda: budget_curve(arrays.value, arrays.min_win_price, budgets),
        max(1, min(cfg.repeats, 3)),
    )
    return _result(len(arrays), seconds, points=16)


def _case_rule(cfg: BenchConfig, rule: str, schedule: str) -> dict[str, object]:
    from replay.bench_rules import prepare_rule_case

    run, rows, prepare_s = prepare_rule_case(rule, cfg.rows, schedule, cfg.seed,
                                             series_max=cfg.series_max)
    seconds = _median_seconds(run, cfg.repeats)
    return _result(rows, seconds, rule=rule, schedule=schedule, prepare_seconds=prepare_s)


def _case_backtest_demo(cfg: BenchConfig) -> dict[str, object]:
    from replay.catalog import Catalog
    from replay.engines.local import backtest
    from replay.ingest import ingest
    from replay.scenario import generate_scenario

    campaigns, days = (4, 3) if cfg.rows < 1_000_000 else (12, 7)
    with tempfile.TemporaryDirectory(prefix="replay-bench-") as tmp:
        folder = Path(tmp)
        files = generate_scenario(folder / "scenario", campaigns=campaigns, days=days,
                                  seed=cfg.seed)
        ingest([files.auctions], folder / "catalog", campaigns=files.campaigns)
        catalog = Catalog(folder / "catalog")
        rows = catalog.row_count()
        counter = iter(range(10_000))

        def run() -> None:
            backtest(catalog, "dual-mirror", out=folder / f"run{next(counter)}", workers=1)

        seconds = _median_seconds(run, max(1, min(cfg.repeats, 3)))
    return _result(rows, seconds, campaigns=campaigns, days=days)


CASES: dict[str, Callable[[BenchConfig], dict[str, object]]] = {
    "reference": _case_reference,
    "ingest_parquet": lambda cfg: _case_ingest(cfg, "parquet"),
    "ingest_csv": lambda cfg: _case_ingest(cfg, "csv"),
    "catalog_scan": _case_catalog_scan,
    "hindsight": _case_hindsight,
    "hindsight_curve": _case_hindsight_curve,
    "backtest_demo": _case_backtest_demo,
}

#: Cases run only with ``--large`` (minutes, several GiB): how cost grows with rows.
LARGE_CASES: dict[str, Callable[[BenchConfig], dict[str, object]]] = {
    "hindsight_1m": lambda cfg: _case_hindsight_rows(cfg, 1_000_000),
    "hindsight_large": lambda cfg: _case_hindsight_rows(cfg, cfg.large_rows),
    "backtest_large": _case_backtest_large,
}


def rule_case_names() -> list[str]:
    """Names of the built-in rules benchmarked at both schedules."""
    from replay.rules.registry import list_rules

    return [cls.name for cls in list_rules()]


def _run_case(name: str, cfg: BenchConfig) -> dict[str, object]:
    # Single-threaded kernels: the targets are per core.
    os.environ.setdefault("NUMBA_NUM_THREADS", "1")
    if name.startswith("rule/"):
        _, rule, schedule = name.split("/")
        return _case_rule(cfg, rule, schedule)
    return {**CASES, **LARGE_CASES}[name](cfg)


def _run_cases(names: list[str], cfg: BenchConfig) -> dict[str, dict[str, object]]:
    out: dict[str, dict[str, object]] = {}
    for name in names:
        try:
            out[name] = _run_case(name, cfg)
        except Exception as exc:  # a failing case must not hide the others
            out[name] = {"error": f"{type(exc).__name__}: {exc}"}
    return out


def _in_child(names: list[str], cfg: BenchConfig) -> dict[str, dict[str, object]]:
    ctx = get_context("spawn")
    with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as pool:
        return pool.submit(_run_cases, names, cfg).result()


def _cpu_model() -> str:
    """The processor's model name (Linux: /proc/cpuinfo), else the platform's word for it:
    rates differ several-fold between CPU models, so a saved run should say which one."""
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    return platform.processor() or platform.machine()


def machine_info() -> dict[str, object]:
    import numba

    return {
        "cpus": os.cpu_count(),
        "cpu_model": _cpu_model(),
        "platform": platform.platform(),
        "processor": platform.machine(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "numba": numba.__version__,
    }


@dataclass(frozen=True)
class Target:
    """A speed or memory goal the project set itself, checked against one bench value."""

    name: str
    goal: str  # as written in the table
    unit: str  # of ``measured``
    at_least: float | None = None  # met when measured >= at_least ...
    at_most: float | None = None  # ... or measured <= at_most
    min_rows: int = 0  # only judged when the case ran at this size or more


#: Rules whose every-request and batch rates have goals: all but ``ftl``, whose goal is
#: its cost at 1,000 updates (each ftl update is an exact hindsight query, by design).
_RATE_GOALS = (("batch", "batch rule, update every 15 min", 100e6),
               ("every_1000", "batch rule, update every 1,000 requests", 100e6),
               ("per_request", "rule updating after every request", 30e6))


def evaluate_targets(result: dict[str, Any]) -> list[dict[str, object]]:
    """One row per goal whose case ran: ``target``, ``case``, ``goal``, ``measured``,
    ``unit`` and ``status`` (``met``, ``missed``, ``not measured`` when the case failed or,
    for the ftl ratio, the hindsight case was not run; ``below target size`` when it ran on
    fewer rows than the goal is stated for)."""
    checks: list[tuple[Target, str, dict | None, float | None]] = []

    def rate(entry: dict | None) -> float | None:
        return entry.get("rows_per_s") if isinstance(entry, dict) else None

    hind = result.get("hindsight")
    checks.append((Target("hindsight solve", ">= 100M rows/s per core", "rows/s",
                          at_least=100e6, min_rows=10_000_000), "hindsight", hind, rate(hind)))
    rules = result.get("rules", {})
    for schedule, what, goal in _RATE_GOALS:
        for rule, entries in rules.items():
            if rule == "ftl":
                continue
            entry = entries.get(schedule)
            checks.append((Target(f"{what}: {rule}", f">= {goal / 1e6:.0f}M rows/s per core",
                                  "rows/s", at_least=goal, min_rows=10_000_000),
                           f"rules.{rule}.{schedule}", entry, rate(entry)))
    ftl = rules.get("ftl", {}).get("1000_updates")
    ratio = result.get("ftl_vs_hindsight", {}).get("ratio")
    checks.append((Target("ftl, 1,000 updates", "<= 3x one hindsight solve", "x solve",
                          at_most=3.0, min_rows=10_000_000), "ftl_vs_hindsight", ftl, ratio))
    ing = result.get("ingest_parquet")
    checks.append((Target("Parquet ingest", ">= 5M rows/s", "rows/s", at_least=5e6,
                          min_rows=5_000_000), "ingest_parquet", ing, rate(ing)))
    big = result.get("backtest_large")
    checks.append((Target("backtest over a 100M-row catalog", "peak memory < 4 GiB", "MiB",
                          at_most=4096.0, min_rows=100_000_000), "backtest_large", big,
                   big.get("peak_tree_rss_mb") if isinstance(big, dict) else None))
    rows_out = []
    for target, case, entry, measured in checks:
        if entry is None:
            continue  # the case was not part of this run (--only, or --large not given)
        if not isinstance(entry, dict) or "error" in entry or measured is None:
            status = "not measured"
        elif int(entry.get("rows", 0)) < target.min_rows:
            status = "below target size"
        elif target.at_least is not None:
            status = "met" if measured >= target.at_least else "missed"
        else:
            status = "met" if measured <= float(target.at_most) else "missed"
        rows_out.append({"target": target.name, "case": case, "goal": target.goal,
                         "measured": None if measured is None else float(measured),
                         "unit": target.unit, "status": status})
    return rows_out


def run_bench(cfg: BenchConfig, progress: Callable[[str], None] | None = None,
              only: list[str] | None = None, large: bool = False) -> dict[str, object]:
    """Run every case (or those in ``only``; ``large`` adds LARGE_CASES) and return the
    JSON-ready result."""
    names = list(CASES) + (list(LARGE_CASES) if large else [])
    for rule in rule_case_names():
        names += [f"rule/{rule}/{schedule}" for schedule in RULE_SCHEDULES]
    names.append("rule/ftl/1000_updates")
    if only:
        names = [n for n in names if any(n == o or n.startswith(o) for o in only)]
    if "reference" not in names:
        names.insert(0, "reference")
    results: dict[str, dict[str, object]] = {}
    if cfg.shared_process:
        if progress:
            progress(f"{len(names)} cases in one process")
        results = _in_child(names, cfg)
    else:
        for name in names:
            if progress:
                progress(name)
            results.update(_in_child([name], cfg))
    reference_rate = results["reference"].get("rows_per_s")
    for entry in results.values():
        rate = entry.get("rows_per_s")
        entry["fraction_of_reference"] = (
            float(rate / reference_rate) if rate and reference_rate else None
        )
    out: dict[str, object] = {
        "format_version": BENCH_FORMAT_VERSION,
        "config": {"rows": cfg.rows, "ingest_rows": cfg.ingest_rows,
                   "repeats": cfg.repeats, "seed": cfg.seed,
                   **({"large_rows": cfg.large_rows, "large_campaigns": cfg.large_campaigns}
                      if large else {})},
        "machine": machine_info(),
    }
    rules: dict[str, dict[str, object]] = {}
    for name, entry in results.items():
        if name.startswith("rule/"):
            _, rule, schedule = name.split("/")
            rules.setdefault(rule, {})[schedule] = entry
        else:
            out[name] = entry
    out["rules"] = rules
    ftl = rules.get("ftl", {}).get("1000_updates")
    hind = out.get("hindsight")
    if ftl and isinstance(hind, dict) and ftl.get("seconds") and hind.get("seconds"):
        out["ftl_vs_hindsight"] = {"ratio": float(ftl["seconds"]) / float(hind["seconds"])}
    out["targets"] = evaluate_targets(out)
    return out
