"""The run store: one folder per backtest run (layout in DEVELOPERS.md, "Run store layout").

Writes are atomic. A finished campaign is one folder ``_parts/<key>/`` (its totals, series
and placements for every setting) built under a temporary name and renamed into place
(``os.replace``), so a part exists whole or not at all. The consolidated tables and the
manifest are written to a temporary file, fsynced and renamed too. ``--resume`` keeps
every finished part, runs the missing campaigns and consolidates; it refuses a run whose
inputs (rule, parameters, sweep, catalog fingerprint, windows, schedule, charges, seed,
campaigns, budget scale, shading model) differ from the requested ones.

Tables are sorted (setting, campaign, update/placement) before they are written, so the
same inputs and seed give the same files whatever the worker count or completion order.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import re
import shutil
import subprocess
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import polars as pl

from replay.errors import RunStoreError

FORMAT = "auction-replay-run"
FORMAT_VERSION = 1
MANIFEST = "manifest.json"
PARTS_DIR = "_parts"
TABLES = ("totals", "series", "placements", "settings")
PART_TABLES = ("totals", "series", "placements")
PART_INFO = "info.json"

#: Manifest keys that define a run's inputs: a resume must match them exactly.
IDENTITY_KEYS = ("rule", "params", "sweep", "catalog.fingerprint", "window", "schedule",
                 "charges", "seed", "campaigns", "budget_scale", "shading")

_TS = pl.Datetime("us", "UTC")

TOTALS_SCHEMA: dict[str, pl.DataType] = {
    "setting_id": pl.Int32, "campaign_id": pl.String, "budget": pl.Float64,
    "auctions": pl.Int64, "wins": pl.Int64, "results": pl.Float64, "spend": pl.Float64,
    "cost_per_result": pl.Float64, "budget_used": pl.Float64, "exhausted_at": _TS,
    "max_cost_per_result": pl.Float64, "cap_violated": pl.Boolean,
    "min_price_cost": pl.Float64, "opt_upper_bound": pl.Float64, "opt_results": pl.Float64,
    "opt_spend": pl.Float64, "opt_lambda": pl.Float64, "regret": pl.Float64,
    "relative_regret": pl.Float64, "regret_unspent": pl.Float64,
    "regret_overpayment": pl.Float64, "regret_misallocation": pl.Float64,
    "regret_cap_slack": pl.Float64, "pacing_error_max": pl.Float64, "pacing_error_mean": pl.Float64,
    "lambda_final": pl.Float64, "lambda_volatility": pl.Float64,
    "bids_above_logged": pl.Float64,
}
#: Columns added after format_version 1 was first written: a run without them reads with
#: nulls there (its regret split has no cap part).
ADDED_COLUMNS: dict[str, tuple[str, ...]] = {"totals": ("regret_cap_slack",)}
SERIES_SCHEMA: dict[str, pl.DataType] = {
    "setting_id": pl.Int32, "campaign_id": pl.String, "update": pl.Int64, "ts": _TS,
    "lambda": pl.Float64, "mu": pl.Float64, "auctions": pl.Int64, "wins": pl.Int64,
    "results": pl.Float64, "spend": pl.Float64, "target_spend": pl.Float64,
    "cum_spend": pl.Float64, "cum_target": pl.Float64, "win_rate": pl.Float64,
}
PLACEMENTS_SCHEMA: dict[str, pl.DataType] = {
    "setting_id": pl.Int32, "campaign_id": pl.String, "placement": pl.String,
    "pricing": pl.String, "auctions": pl.Int64, "wins": pl.Int64, "results": pl.Float64,
    "spend": pl.Float64, "opt_results": pl.Float64, "opt_spend": pl.Float64,
    "marginal_cost_per_result": pl.Float64, "opt_marginal_cost_per_result": pl.Float64,
}
SCHEMAS: dict[str, dict[str, pl.DataType]] = {
    "totals": TOTALS_SCHEMA, "series": SERIES_SCHEMA, "placements": PLACEMENTS_SCHEMA,
}
SORT_KEYS: dict[str, list[str]] = {
    "totals": ["setting_id", "campaign_id"],
    "series": ["setting_id", "campaign_id", "update"],
    "placements": ["setting_id", "campaign_id", "placement"],
    "settings": ["setting_id"],
}


# ----------------------------------------------------------------------------- helpers


def code_version() -> str:
    """``replay.__version__`` plus ``git describe`` of the source tree when available."""
    from replay import __version__

    root = Path(__file__).resolve().parent.parent
    if not (root / ".git").exists():
        return __version__
    try:
        out = subprocess.run(["git", "describe", "--always", "--dirty", "--tags"], cwd=root,
                             capture_output=True, text=True, timeout=5, check=False)
    except (OSError, subprocess.SubprocessError):
        return __version__
    desc = out.stdout.strip()
    return f"{__version__}+git.{desc}" if out.returncode == 0 and desc else __version__


def jsonable(x: Any) -> Any:
    """Plain JSON types (NaN and inf become null; tuples become lists)."""
    if isinstance(x, Mapping):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [jsonable(v) for v in x]
    if isinstance(x, bool) or x is None or isinstance(x, str):
        return x
    if isinstance(x, int):
        return int(x)
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if hasattr(x, "item"):  # numpy scalar
        return jsonable(x.item())
    return str(x)


def part_key(campaign_id: str) -> str:
    """A file-system safe, collision-free folder name for one campaign's part."""
    safe = re.sub(r"[^A-Za-z0-9_.-]", "_", campaign_id)[:48].lstrip(".") or "c"
    digest = hashlib.blake2b(campaign_id.encode(), digest_size=6).hexdigest()
    return f"{safe}-{digest}"


def _fsync_path(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    # Directory fsync makes the rename durable; not every file system allows it.
    with contextlib.suppress(OSError):
        _fsync_path(path)


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.tmp-{os.getpid()}")


def write_parquet_atomic(df: pl.DataFrame, path: Path) -> None:
    """Write ``df`` to ``path`` so that a reader sees the old file or the whole new one."""
    tmp = _tmp_name(path)
    df.write_parquet(tmp, compression="zstd", statistics=True)
    _fsync_path(tmp)
    os.replace(tmp, path)
    _fsync_dir(path.parent)


def write_json_atomic(obj: Any, path: Path) -> None:
    tmp = _tmp_name(path)
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(jsonable(obj), fh, indent=2, sort_keys=False)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    _fsync_dir(path.parent)


def conform(df: pl.DataFrame | None, table: str) -> pl.DataFrame:
    """Exactly the documented columns of ``table``, in order, with their types."""
    schema = SCHEMAS[table]
    if df is None or df.width == 0:
        return pl.DataFrame(schema=schema)
    df = _with_added_columns(df, table)
    missing = [c for c in schema if c not in df.columns]
    if missing:
        raise ValueError(f"{table} table lacks columns {missing}")
    return df.select([pl.col(c).cast(t, strict=False) for c, t in schema.items()])


def _with_added_columns(df: pl.DataFrame, table: str) -> pl.DataFrame:
    """``df`` with the ``ADDED_COLUMNS`` of ``table`` it lacks, as nulls."""
    added = [c for c in ADDED_COLUMNS.get(table, ()) if c not in df.columns]
    if not added:
        return df
    return df.with_columns(pl.lit(None, dtype=SCHEMAS[table][c]).alias(c) for c in added)


def _get(manifest: Mapping[str, Any], dotted: str) -> Any:
    cur: Any = manifest
    for part in dotted.split("."):
        cur = cur.get(part) if isinstance(cur, Mapping) else None
    return jsonable(cur)


def manifest_differences(old: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
    """Identity keys whose values differ between two manifests (empty when resumable)."""
    out = []
    for key in IDENTITY_KEYS:
        a, b = _get(old, key), _get(new, key)
        if a != b:
            out.append(f"{key} (run: {json.dumps(a)[:80]}, now: {json.dumps(b)[:80]})")
    return out


# ----------------------------------------------------------------------------- reading


@dataclass
class Run:
    """A finished run read back: its manifest and its four tables (polars)."""

    path: Path
    manifest: dict[str, Any]
    totals: pl.DataFrame
    series: pl.DataFrame
    placements: pl.DataFrame
    settings: pl.DataFrame

    @property
    def run_dir(self) -> Path:
        return self.path

    @property
    def skipped(self) -> dict[str, str]:
        """Campaigns not replayed, with the reason (e.g. no rows in the window)."""
        return dict(self.manifest.get("skipped") or {})


def read_manifest(path: str | Path) -> dict[str, Any]:
    """The manifest of a run folder; ``RunStoreError`` when missing, unreadable or foreign."""
    run_dir = Path(path)
    mpath = run_dir / MANIFEST
    if not run_dir.is_dir():
        raise RunStoreError(f"{run_dir}: no such run folder")
    if not mpath.is_file():
        raise RunStoreError(f"{run_dir}: not a run folder (missing {MANIFEST}); run "
                            "`replay backtest ... --out` to create one")
    try:
        manifest = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise RunStoreError(f"{mpath}: unreadable manifest ({exc.__class__.__name__}: "
                            f"{str(exc)[:80]})") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise RunStoreError(f"{mpath}: not a run manifest (format must be {FORMAT!r})")
    version = manifest.get("format_version")
    if version != FORMAT_VERSION:
        raise RunStoreError(f"{mpath}: run format_version {version!r} is not supported by "
                            f"this version (reads format_version {FORMAT_VERSION}); rerun the "
                            "backtest with this version")
    return manifest


def _read_table(path: Path) -> pl.DataFrame:
    if not path.is_file():
        raise RunStoreError(f"{path}: table missing from the run folder")
    try:
        return pl.read_parquet(path)
    except Exception as exc:  # noqa: BLE001 - any reader failure means a corrupt file
        raise RunStoreError(f"{path}: corrupted table, not readable as Parquet "
                            f"({exc.__class__.__name__}); rerun the backtest into a new "
                            "folder") from None


def open_run(path: str | Path, *, allow_running: bool = False) -> Run:
    """Read a run folder. ``RunStoreError`` for a missing manifest, another format version,
    a corrupted or missing table, or a run still marked ``running`` (unless
    ``allow_running``, which returns the parts written so far)."""
    run_dir = Path(path)
    manifest = read_manifest(run_dir)
    status = manifest.get("status")
    if status != "complete":
        if not allow_running:
            raise RunStoreError(f"{run_dir}: the run is not complete (status {status!r}); "
                                "finish it with the same `replay backtest ... --out "
                                f"{run_dir} --resume`")
        tables = _consolidate_parts(run_dir / PARTS_DIR)
        settings = (_read_table(run_dir / "settings.parquet")
                    if (run_dir / "settings.parquet").is_file() else pl.DataFrame())
        return Run(run_dir, manifest, tables["totals"], tables["series"],
                   tables["placements"], settings)
    tables = {name: _read_table(run_dir / f"{name}.parquet") for name in TABLES}
    for name in PART_TABLES:
        tables[name] = _with_added_columns(tables[name], name)
        cols = tables[name].columns
        missing = [c for c in SCHEMAS[name] if c not in cols]
        if missing:
            raise RunStoreError(f"{run_dir / (name + '.parquet')}: corrupted table, missing "
                                f"columns {', '.join(missing)}")
    return Run(run_dir, manifest, tables["totals"], tables["series"], tables["placements"],
               tables["settings"])


def _read_part(folder: Path) -> tuple[dict[str, Any], dict[str, pl.DataFrame]]:
    try:
        info = json.loads((folder / PART_INFO).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise RunStoreError(f"{folder}: unreadable run part ({exc.__class__.__name__})") \
            from None
    return info, {name: _read_table(folder / f"{name}.parquet") for name in PART_TABLES}


def _consolidate_parts(parts_dir: Path,
                       order: Iterable[str] | None = None) -> dict[str, pl.DataFrame]:
    frames: dict[str, list[pl.DataFrame]] = {name: [] for name in PART_TABLES}
    folders = sorted(p for p in parts_dir.iterdir() if p.is_dir() and not
                     p.name.startswith(".")) if parts_dir.is_dir() else []
    for folder in folders:
        _, tables = _read_part(folder)
        for name in PART_TABLES:
            frames[name].append(conform(tables[name], name))
    out = {}
    for name in PART_TABLES:
        df = pl.concat(frames[name]) if frames[name] else pl.DataFrame(schema=SCHEMAS[name])
        out[name] = df.sort(SORT_KEYS[name], maintain_order=True)
    return out


# ----------------------------------------------------------------------------- writing


@dataclass
class RunStore:
    """Writer of one run folder. Use :meth:`create`, then :meth:`write_campaign` per
    finished campaign (any order), then :meth:`finish`."""

    path: Path
    manifest: dict[str, Any]
    done: dict[str, str | None] = field(default_factory=dict)  # campaign -> skip reason

    @classmethod
    def create(cls, path: str | Path, manifest: Mapping[str, Any],
               resume: bool = False) -> RunStore:
        """Start a run in ``path`` (created; must be new or empty) or, with ``resume``,
        continue the unfinished run there (its manifest must match ``manifest``)."""
        run_dir = Path(path)
        full = {"format": FORMAT, "format_version": FORMAT_VERSION,
                "code_version": code_version(), **dict(manifest), "status": "running",
                "created_at": datetime.now(UTC).isoformat(timespec="seconds")
                .replace("+00:00", "Z")}
        full = jsonable(full)
        mpath = run_dir / MANIFEST
        if resume:
            if not mpath.is_file():
                if run_dir.is_dir() and any(run_dir.iterdir()):
                    raise RunStoreError(f"{run_dir}: cannot resume, not a run folder (missing "
                                        f"{MANIFEST})")
                resume = False
            else:
                old = read_manifest(run_dir)
                diff = manifest_differences(old, full)
                if diff:
                    raise RunStoreError(f"{run_dir}: cannot resume, the run was made with "
                                        f"other inputs: {'; '.join(diff)}")
                store = cls(run_dir, old)
                if old.get("status") != "complete":
                    store._load_done()
                return store
        if run_dir.exists() and (not run_dir.is_dir() or any(run_dir.iterdir())):
            hint = "--resume to finish it" if mpath.is_file() else "an empty or new folder"
            raise RunStoreError(f"{run_dir}: output folder exists and is not empty; use "
                                f"{hint}, or another --out")
        (run_dir / PARTS_DIR).mkdir(parents=True, exist_ok=True)
        write_json_atomic(full, mpath)
        return cls(run_dir, full)

    @property
    def status(self) -> str:
        return str(self.manifest.get("status"))

    @property
    def complete(self) -> bool:
        """True when resuming a run that already finished (nothing left to do)."""
        return self.status == "complete"

    def _load_done(self) -> None:
        parts = self.path / PARTS_DIR
        parts.mkdir(parents=True, exist_ok=True)
        for folder in parts.iterdir():
            if folder.name.startswith("."):
                # A temporary part left by an interrupted write: never complete, drop it.
                shutil.rmtree(folder, ignore_errors=True)
                continue
            info, _ = _read_part(folder)
            self.done[str(info["campaign_id"])] = info.get("skipped")

    def is_done(self, campaign_id: str) -> bool:
        return campaign_id in self.done

    def write_campaign(self, campaign_id: str, tables: Mapping[str, pl.DataFrame | None],
                       skipped: str | None = None) -> None:
        """Write one campaign's part atomically (all settings; ``skipped`` = why it has no
        rows)."""
        parts = self.path / PARTS_DIR
        final = parts / part_key(campaign_id)
        tmp = parts / f".{final.name}.tmp-{os.getpid()}"
        if tmp.exists():
            shutil.rmtree(tmp)
        tmp.mkdir(parents=True)
        for name in PART_TABLES:
            df = conform(tables.get(name), name)
            path = tmp / f"{name}.parquet"
            df.write_parquet(path, compression="zstd", statistics=True)
            _fsync_path(path)
        info_path = tmp / PART_INFO
        with open(info_path, "w", encoding="utf-8") as fh:
            json.dump({"campaign_id": campaign_id, "skipped": skipped}, fh)
            fh.flush()
            os.fsync(fh.fileno())
        _fsync_dir(tmp)
        if final.exists():  # a rerun of the same campaign replaces its part
            shutil.rmtree(final)
        os.replace(tmp, final)
        _fsync_dir(parts)
        self.done[campaign_id] = skipped

    def tables(self) -> dict[str, pl.DataFrame]:
        """The finished parts consolidated (sorted), without writing anything."""
        return _consolidate_parts(self.path / PARTS_DIR)

    def finish(self, settings: pl.DataFrame, extra: Mapping[str, Any] | None = None) -> Run:
        """Consolidate the parts into the final tables, mark the run complete, drop _parts.

        ``extra``: manifest entries computed at the end (e.g. group optima)."""
        parts = self.path / PARTS_DIR
        tables = _consolidate_parts(parts)
        tables["settings"] = settings.sort("setting_id")
        for name in TABLES:
            write_parquet_atomic(tables[name], self.path / f"{name}.parquet")
        skipped = {cid: why for cid, why in sorted(self.done.items()) if why}
        self.manifest = {**self.manifest, **jsonable(dict(extra or {})), "skipped": skipped,
                         "status": "complete",
                         "finished_at": datetime.now(UTC).isoformat(timespec="seconds")
                         .replace("+00:00", "Z")}
        write_json_atomic(self.manifest, self.path / MANIFEST)
        shutil.rmtree(parts, ignore_errors=True)
        return Run(self.path, self.manifest, tables["totals"], tables["series"],
                   tables["placements"], tables["settings"])
