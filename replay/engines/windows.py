"""Option parsing shared by ``replay backtest`` and ``replay whatif``: durations, time
windows, ``--set key=value`` and ``--sweep key=v1,v2`` against a rule's declared parameters.

Every bad value raises :class:`replay.errors.UsageError` with one line naming the option,
the value and what is allowed.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from replay.errors import UsageError
from replay.schema import US_PER_DAY, US_PER_SECOND, CampaignSpec, to_us

#: Accepted duration suffixes and their length in microseconds.
DURATION_UNITS: dict[str, int] = {
    "s": US_PER_SECOND,
    "min": 60 * US_PER_SECOND,
    "h": 3_600 * US_PER_SECOND,
    "d": US_PER_DAY,
}
_DURATION_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([a-zA-Z]+)\s*$")
_DURATION_HELP = "a positive number with a unit s, min, h or d (e.g. 30s, 15min, 1h, 2d)"

#: Sweep/setting keys that belong to the engine, not to the rule's parameters.
SCHEDULE_KEYS = ("every", "every_n")
ENGINE_KEYS = (*SCHEDULE_KEYS, "charges")
CHARGE_MODES = ("expected", "sampled")


# ----------------------------------------------------------------------------- durations


def parse_duration(text: str | int | float, option: str = "--every") -> int:
    """``"15min"`` -> microseconds (int). Units: s, min, h, d; the unit is required.

    Zero, negative and unit-less values are refused (a bare ``15`` could mean seconds or
    minutes, so it is ambiguous).
    """
    if isinstance(text, bool) or not isinstance(text, str):
        raise UsageError(f"{option} {text!r}: a duration needs a unit; allowed: {_DURATION_HELP}")
    raw = text.strip()
    if raw.startswith("-"):
        raise UsageError(f"{option} {text!r}: a duration must be positive; allowed: "
                         f"{_DURATION_HELP}")
    m = _DURATION_RE.match(raw)
    if m is None:
        if re.match(r"^\s*[0-9.eE+]+\s*$", raw):
            raise UsageError(f"{option} {text!r}: missing unit; allowed: {_DURATION_HELP}")
        raise UsageError(f"{option} {text!r}: not a duration; allowed: {_DURATION_HELP}")
    number, unit = float(m.group(1)), m.group(2).lower()
    if unit not in DURATION_UNITS:
        raise UsageError(f"{option} {text!r}: unknown unit {m.group(2)!r}; allowed units: "
                         f"{', '.join(DURATION_UNITS)}")
    us = round(number * DURATION_UNITS[unit])
    if not math.isfinite(number) or us <= 0:
        raise UsageError(f"{option} {text!r}: a duration must be positive; allowed: "
                         f"{_DURATION_HELP}")
    return int(us)


def format_duration(us: int) -> str:
    """Microseconds -> the shortest exact text (``900000000`` -> ``"15min"``)."""
    for unit in ("d", "h", "min", "s"):
        size = DURATION_UNITS[unit]
        if us % size == 0:
            return f"{us // size}{unit}"
    return f"{us / US_PER_SECOND:g}s"


# ----------------------------------------------------------------------------- times


def iso(us: int | None) -> str | None:
    """Microseconds -> ISO-8601 UTC text (manifest format)."""
    if us is None:
        return None
    dt = datetime(1970, 1, 1, tzinfo=UTC) + timedelta(microseconds=int(us))
    return dt.isoformat().replace("+00:00", "Z")


@dataclass(frozen=True)
class Windows:
    """The run's windows in microseconds UTC, all half-open ``[start, end)``.

    ``train_days`` is kept so each campaign's default training window can be placed before
    its own (possibly later) flight start; with ``explicit_train`` the given training
    window is used for every campaign.
    """

    start_us: int
    end_us: int
    train_start_us: int
    train_end_us: int
    train_us: int
    explicit_train: bool = False

    def to_manifest(self) -> dict[str, str | None]:
        return {"start": iso(self.start_us), "end": iso(self.end_us),
                "train_start": iso(self.train_start_us), "train_end": iso(self.train_end_us)}


def compute_windows(span_us: tuple[int, int], *, start: Any = None, end: Any = None,
                    train_days: float = 1.0, train_start: Any = None,
                    train_end: Any = None) -> Windows:
    """Replay and training windows from the catalog's time span (min ts, max ts).

    Defaults: replay from catalog start (floored to the minute) + ``train_days`` to the
    catalog end (inclusive of the last row); training = the ``train_days`` before the
    replay start. Explicit ``train_start``/``train_end`` override it; the training
    window must end at or before the replay start (no look-ahead).
    """
    if isinstance(train_days, bool) or not isinstance(train_days, int | float) or \
            not math.isfinite(train_days) or train_days <= 0:
        raise UsageError(f"--train-days {train_days!r}: must be a positive number of days "
                         "(e.g. 1 or 0.5)")
    train_us = round(float(train_days) * US_PER_DAY)
    lo, hi = int(span_us[0]), int(span_us[1])
    s = to_us(start, "--start")
    e = to_us(end, "--end")
    ts = to_us(train_start, "--train-start")
    te = to_us(train_end, "--train-end")
    if s is None:
        # From the catalog start floored to the whole minute, so update boundaries fall on
        # round times; the training window then starts at or before the first row.
        s = (te if te is not None else lo - lo % (60 * US_PER_SECOND) + train_us)
    if e is None:
        e = hi + 1  # the end is exclusive; keep the last logged row
    if s >= e:
        raise UsageError(f"empty replay window: start {iso(s)} is not before end {iso(e)} "
                         f"(catalog spans {iso(lo)} to {iso(hi)}); choose --start/--end inside "
                         "it or a smaller --train-days")
    if s > hi or e <= lo:
        raise UsageError(f"empty replay window: [{iso(s)}, {iso(e)}) holds no logged row "
                         f"(catalog spans {iso(lo)} to {iso(hi)})")
    explicit = ts is not None or te is not None
    if te is None:
        te = s
    if ts is None:
        ts = te - train_us
    if te > s:
        raise UsageError(f"--train-end {iso(te)} is after the replay start {iso(s)}: the "
                         "training window must end before the replay window (no look-ahead)")
    if ts >= te:
        raise UsageError(f"empty training window: --train-start {iso(ts)} is not before "
                         f"--train-end {iso(te)}")
    return Windows(s, e, ts, te, train_us, explicit)


@dataclass(frozen=True)
class CampaignWindow:
    """One campaign's replay (flight inside the run window) and training windows (us)."""

    start_us: int
    end_us: int
    train_start_us: int
    train_end_us: int

    @property
    def empty(self) -> bool:
        return self.start_us >= self.end_us


def campaign_window(windows: Windows, spec: CampaignSpec) -> CampaignWindow:
    """Clip the run window to the campaign's flight; place its training window before it.

    Rows before the flight start are never replayed; with the default training window
    they are the campaign's training data (the ``train_days`` before its replay start).
    """
    s = windows.start_us if spec.start_us is None else max(windows.start_us, spec.start_us)
    e = windows.end_us if spec.end_us is None else min(windows.end_us, spec.end_us)
    if windows.explicit_train:
        ts, te = windows.train_start_us, windows.train_end_us
    else:
        te = s
        ts = s - windows.train_us
    return CampaignWindow(s, e, ts, te)


# ----------------------------------------------------------------------------- --set / --sweep


def _split_pair(item: str, option: str) -> tuple[str, str]:
    key, sep, value = item.partition("=")
    if not sep or not key.strip():
        raise UsageError(f"{option} {item!r}: expected key=value")
    return key.strip().replace("-", "_"), value.strip()


def parse_set(items: Iterable[str], rule_cls: Any) -> dict[str, Any]:
    """``["step=0.1", "normalize=false"]`` -> ``{"step": 0.1, "normalize": False}``.

    Values are converted and checked by the rule's declared ``Param`` specs; an unknown
    key names the allowed ones.
    """
    specs = rule_cls.param_specs()
    out: dict[str, Any] = {}
    for item in items:
        key, value = _split_pair(item, "--set")
        out[key] = convert_param(rule_cls, key, value, specs)
    return out


def convert_param(rule_cls: Any, key: str, value: Any,
                  specs: Mapping[str, Any] | None = None) -> Any:
    """One rule parameter, typed and checked (``UsageError`` naming the allowed values)."""
    specs = rule_cls.param_specs() if specs is None else specs
    if key not in specs:
        allowed = ", ".join(specs) or "none"
        raise UsageError(f"rule {rule_cls.name!r}: unknown parameter {key!r}; allowed: "
                         f"{allowed}")
    return specs[key].convert(key, rule_cls.name, value)


def convert_engine_value(key: str, value: Any) -> Any:
    """A value of an engine key of a sweep: ``every`` (duration text, kept as text after
    validation), ``every_n`` (positive int) or ``charges``."""
    if key == "every":
        text = str(value).strip()
        parse_duration(text, "--sweep every")
        return text
    if key == "every_n":
        try:
            n = int(str(value).strip())
        except ValueError:
            n = 0
        if n <= 0:
            raise UsageError(f"--sweep every_n={value!r}: must be a positive integer "
                             "(number of requests per update)")
        return n
    if key == "charges":
        text = str(value).strip()
        if text not in CHARGE_MODES:
            raise UsageError(f"--sweep charges={value!r}: allowed: {'|'.join(CHARGE_MODES)}")
        return text
    raise KeyError(key)


def parse_sweep(items: Iterable[str], rule_cls: Any) -> dict[str, list[Any]]:
    """``["step=0.05,0.1", "every=5min,15min"]`` -> ``{"step": [0.05, 0.1], "every": [...]}``.

    Keys: the rule's parameters plus ``every``, ``every_n`` and ``charges``. Each axis is
    given once; values are converted as by ``--set``.
    """
    raw: dict[str, list[str]] = {}
    for item in items:
        key, value = _split_pair(item, "--sweep")
        if key in raw:
            raise UsageError(f"--sweep {key}: given twice; list all values in one "
                             f"--sweep {key}=v1,v2,...")
        values = [v.strip() for v in value.split(",") if v.strip()]
        if not values:
            raise UsageError(f"--sweep {item!r}: no values; expected key=v1,v2,...")
        raw[key] = values
    return normalize_sweep(raw, rule_cls)


def normalize_sweep(sweep: Mapping[str, Sequence[Any]] | None,
                    rule_cls: Any) -> dict[str, list[Any]]:
    """Typed, checked sweep axes (keys in the given order; values as given, deduplicated)."""
    if not sweep:
        return {}
    specs = rule_cls.param_specs()
    out: dict[str, list[Any]] = {}
    if "every" in sweep and "every_n" in sweep:
        raise UsageError("--sweep every and --sweep every_n exclude each other; sweep one "
                         "schedule kind")
    for key, values in sweep.items():
        k = str(key).replace("-", "_")
        if isinstance(values, str | bytes) or not isinstance(values, Sequence):
            values = [values]
        if len(values) == 0:
            raise UsageError(f"--sweep {k}: no values; expected {k}=v1,v2,...")
        if k in ENGINE_KEYS:
            typed = [convert_engine_value(k, v) for v in values]
        elif k in specs:
            typed = [convert_param(rule_cls, k, v, specs) for v in values]
        else:
            allowed = ", ".join([*specs, *ENGINE_KEYS])
            raise UsageError(f"--sweep {k}: unknown key for rule {rule_cls.name!r}; allowed: "
                             f"{allowed}")
        seen: list[Any] = []
        for v in typed:
            if v not in seen:
                seen.append(v)
        out[k] = seen
    return out


def check_schedule(every: str | None, every_n: int | None) -> tuple[int | None, int | None]:
    """``--every DUR`` or ``--every-n N`` (exactly one) -> ``(every_us, every_n)``."""
    if every is not None and every_n is not None:
        raise UsageError("--every and --every-n exclude each other; give one of them")
    if every_n is not None:
        if isinstance(every_n, bool) or not isinstance(every_n, int) or every_n <= 0:
            raise UsageError(f"--every-n {every_n!r}: must be a positive integer (requests "
                             "per update)")
        return None, int(every_n)
    if every is None:
        raise UsageError("give --every DUR (e.g. 15min) or --every-n N")
    return parse_duration(every, "--every"), None


def check_charges(charges: str) -> str:
    if charges not in CHARGE_MODES:
        raise UsageError(f"--charges {charges!r}: allowed: {'|'.join(CHARGE_MODES)}")
    return charges
