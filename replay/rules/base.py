"""The bid-rule protocol: declared parameters, ``fit`` on the training window, online updates.

A rule is a small estimator in the scikit-learn sense:

* parameters are class attributes ``Param(default, unit, doc, check)``; the constructor
  takes keyword parameters only and validates each one;
* ``fit(context)`` learns from the training window only (``TrainingContext``) and returns self;
* ``start()`` returns the online state vector (``state[0]`` = lambda, results per currency;
  ``state[1]`` = mu, the cap multiplier); ``update(feedback)`` moves it after each interval;
* learned values carry a trailing underscore: ``lambda_``, ``mu_``, ``lambda0_``.

The engine bids ``w = value * (1 + mu * C) / (max(lambda, 1e-12) + mu)`` (currency per
impression; ``C`` the cost-per-result cap, 0 without one), shaded on first-price rows.

A built-in rule also ships a numba function ``numba_update(state, params, fb)`` so the
replay runs as one compiled loop. ``fb`` is read-only: index it with
``replay.kernels.replay_loop.FB_*`` only, since it is a float64 array or, when one row
feeds each update, a tuple of ``FB_SIZE`` floats (the engine compiles the update for a
tuple before every replay). A rule written in plain Python only overrides ``update`` and
runs through the generic path.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from replay.errors import UsageError
from replay.kernels import replay_loop as rl
from replay.schema import CampaignArrays, CampaignSpec

_MISSING = object()


# ----------------------------------------------------------------------------- parameters


@dataclass(frozen=True)
class Range:
    """Numeric check: ``low <= x <= high`` (``low_open``/``high_open`` make it strict)."""

    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False

    def __call__(self, x: float) -> bool:
        if not np.isfinite(x):
            return False
        if self.low is not None and (x <= self.low if self.low_open else x < self.low):
            return False
        return not (self.high is not None and (x >= self.high if self.high_open else
                                                x > self.high))

    def describe(self) -> str:
        lo = "-inf" if self.low is None else f"{self.low:g}"
        hi = "inf" if self.high is None else f"{self.high:g}"
        return f"{'(' if self.low_open or self.low is None else '['}{lo}, {hi}" \
               f"{')' if self.high_open or self.high is None else ']'}"


@dataclass(frozen=True)
class Choice:
    """String check: one of ``options``."""

    options: tuple[str, ...]

    def __call__(self, x: str) -> bool:
        return x in self.options

    def describe(self) -> str:
        return "|".join(self.options)


POSITIVE = Range(0.0, None, low_open=True)
NON_NEGATIVE = Range(0.0, None)


@dataclass(frozen=True)
class Param:
    """One declared parameter of a rule.

    ``kind`` is inferred from the default (float, int, bool, str) unless given; ``"dict"``
    means ``placement:number,...`` (a mapping of placement name to a number). ``None`` as
    default means "learned in fit" (e.g. the cold start) and is always accepted.
    """

    default: Any
    unit: str
    doc: str
    check: Range | Choice | Callable[[Any], bool] | None = None
    kind: str | None = None

    @property
    def type_name(self) -> str:
        if self.kind is not None:
            return self.kind
        if isinstance(self.default, bool):
            return "bool"
        if isinstance(self.default, int):
            return "int"
        if isinstance(self.default, str):
            return "str"
        return "float"

    def allowed(self) -> str:
        """Human text for the allowed values."""
        t = self.type_name
        if isinstance(self.check, Range | Choice):
            return self.check.describe()
        if t == "bool":
            return "true|false"
        if t == "dict":
            return "placement:number,... (numbers >= 0)"
        return t

    def convert(self, name: str, rule: str, x: Any) -> Any:
        """Parse (strings from ``--set key=value`` are accepted) and validate one value."""
        bad = f"rule {rule!r}: parameter {name!r} = {x!r} is not allowed; allowed: " \
              f"{self.allowed()} ({self.unit})"
        if x is None or (isinstance(x, str) and x.strip().lower() in ("none", "auto", "")):
            if self.default is None:
                return None
            raise UsageError(bad)
        t = self.type_name
        try:
            if t == "bool":
                if isinstance(x, str):
                    s = x.strip().lower()
                    if s not in ("true", "false", "1", "0", "yes", "no"):
                        raise ValueError(s)
                    x = s in ("true", "1", "yes")
                elif not isinstance(x, bool | np.bool_):
                    raise ValueError(x)
                x = bool(x)
            elif t == "int":
                if isinstance(x, bool) or (isinstance(x, float) and not float(x).is_integer()):
                    raise ValueError(x)
                x = int(x)
            elif t == "float":
                if isinstance(x, bool):
                    raise ValueError(x)
                x = float(x)
            elif t == "str":
                x = str(x).strip()
            elif t == "dict":
                x = _parse_dict(x)
        except (TypeError, ValueError):
            raise UsageError(bad) from None
        if t == "dict":
            if any(not (np.isfinite(v) and v >= 0) for v in x.values()):
                raise UsageError(bad)
        elif self.check is not None and not self.check(x):
            raise UsageError(bad)
        return x


def _parse_dict(x: Any) -> dict[str, float]:
    if isinstance(x, dict):
        return {str(k): float(v) for k, v in x.items()}
    out: dict[str, float] = {}
    for part in str(x).split(","):
        if not part.strip():
            continue
        key, sep, val = part.rpartition(":")
        if not sep or not key.strip():
            raise ValueError(part)
        out[key.strip()] = float(val)
    if not out:
        raise ValueError(x)
    return out


# ----------------------------------------------------------------------------- inputs


@dataclass(frozen=True)
class TrainingContext:
    """What a rule may learn from: the training window only, plus the campaign settings.

    ``start_us``/``end_us`` bound the replay window (the flight), ``train_start_us``/
    ``train_end_us`` the training window (``train_end_us <= start_us``). ``shading`` holds
    the landscape tables fit by the engine on the training rows. ``expected_auctions`` is
    the forecast number of auctions in the replay window from the training traffic (NaN
    without training rows). ``traffic_curve`` is ``(t_us, share)``: the cumulative share of
    forecast traffic over the flight (float64 knots, share 0 at start, 1 at end).
    """

    train: CampaignArrays
    spec: CampaignSpec
    placements: tuple[tuple[str, str], ...]
    start_us: int
    end_us: int
    train_start_us: int
    train_end_us: int
    shading: Any = None
    expected_auctions: float = float("nan")
    traffic_curve: tuple[np.ndarray, np.ndarray] | None = None
    cache: dict = field(default_factory=dict, compare=False)

    @property
    def budget(self) -> float:
        return float(self.spec.budget)

    @property
    def cap(self) -> float | None:
        return self.spec.max_cost_per_result

    def uniform_curve(self) -> tuple[np.ndarray, np.ndarray]:
        return (np.array([self.start_us, self.end_us], np.float64), np.array([0.0, 1.0]))


@dataclass
class IntervalFeedback:
    """What a rule learns at the end of interval k (all of it from rows before the decision).

    Spends in currency, results in the campaign's result unit, times in microseconds UTC.
    ``fb`` is the same information as a float64 vector (indexes
    ``replay.kernels.replay_loop.FB_*``; the compiled loop gives numba updates this array,
    or these fields as a tuple when one row feeds each update). ``value``/``min_win_price``
    are the interval's rows (views; past rows only).
    """

    k: int
    auctions: int
    wins: int
    results: float
    spend: float  # realized charges
    expected_spend: float  # sum of prices of won rows
    target_spend: float  # target curve over this interval
    cum_spend: float
    cum_expected_spend: float
    cum_target: float
    cum_results: float
    remaining_budget: float
    t_start_us: int
    t_end_us: int
    budget: float
    remaining_share: float  # share of the target curve after t_end
    rows_seen: int  # replay rows before the decision
    norm: float  # per-interval spend normalizer (currency), see FB_NORM
    exhausted: bool
    value: np.ndarray
    min_win_price: np.ndarray
    fb: np.ndarray

    @classmethod
    def from_vector(cls, fb: np.ndarray, value: np.ndarray,
                    min_win_price: np.ndarray) -> IntervalFeedback:
        return cls(
            k=int(fb[rl.FB_K]), auctions=int(fb[rl.FB_AUCTIONS]), wins=int(fb[rl.FB_WINS]),
            results=float(fb[rl.FB_RESULTS]), spend=float(fb[rl.FB_SPEND]),
            expected_spend=float(fb[rl.FB_EXPECTED_SPEND]),
            target_spend=float(fb[rl.FB_TARGET]), cum_spend=float(fb[rl.FB_CUM_SPEND]),
            cum_expected_spend=float(fb[rl.FB_CUM_EXPECTED]),
            cum_target=float(fb[rl.FB_CUM_TARGET]), cum_results=float(fb[rl.FB_CUM_RESULTS]),
            remaining_budget=float(fb[rl.FB_REMAINING]), t_start_us=int(fb[rl.FB_T_START]),
            t_end_us=int(fb[rl.FB_T_END]), budget=float(fb[rl.FB_BUDGET]),
            remaining_share=float(fb[rl.FB_REMAINING_SHARE]),
            rows_seen=int(fb[rl.FB_ROWS_SEEN]), norm=float(fb[rl.FB_NORM]),
            exhausted=bool(fb[rl.FB_EXHAUSTED]), value=value, min_win_price=min_win_price,
            fb=fb,
        )


# ----------------------------------------------------------------------------- the rule


class BidRule:
    """Base class of every bid rule (see the module docstring for the protocol).

    Subclasses set ``name`` (registry name), ``summary`` (one line), declare ``Param``
    class attributes, and override ``fit``/``start``/``update``. Built-in rules also set
    ``numba_update`` (an ``@njit`` function) and fill ``params_`` (float64 vector) in fit.
    """

    name: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    #: True: bid = a fixed price per placement (``bid_per_placement_``), not value-based.
    fixed_bid: ClassVar[bool] = False
    #: True: the engine keeps an FTL index of all rows seen (training + past replay rows)
    #: in ``index_``; after each update, if ``state[2]`` is not NaN, the loop sets
    #: ``lambda = ftl_lambda_for_spend(index, state[2])``.
    uses_index: ClassVar[bool] = False
    numba_update: ClassVar[Any] = None

    def __init__(self, **params: Any) -> None:
        specs = self.param_specs()
        for key in params:
            if key not in specs:
                allowed = ", ".join(specs) or "none"
                raise UsageError(f"rule {self.name!r}: unknown parameter {key!r}; "
                                 f"allowed: {allowed}")
        for key, spec in specs.items():
            raw = params.get(key, _MISSING)
            value = spec.default if raw is _MISSING else spec.convert(key, self.name, raw)
            object.__setattr__(self, key, value)
        self.state_: np.ndarray = np.array([0.0, 0.0, np.nan])
        self.params_: np.ndarray = np.zeros(1)
        self.curve_: tuple[np.ndarray, np.ndarray] | None = None
        self.bid_per_placement_: np.ndarray = np.zeros(0)
        self.index_: Any = None
        self.fitted_ = False

    # -- parameters
    @classmethod
    def param_specs(cls) -> dict[str, Param]:
        """Declared parameters, in declaration order (base classes first)."""
        out: dict[str, Param] = {}
        for klass in reversed(cls.__mro__):
            for key, val in vars(klass).items():
                if isinstance(val, Param):
                    out[key] = val
        return out

    def get_params(self) -> dict[str, Any]:
        return {key: getattr(self, key) for key in self.param_specs()}

    def __repr__(self) -> str:
        inner = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({inner})"

    # -- learned state
    @property
    def lambda_(self) -> float:
        return float(self.state_[rl.STATE_LAMBDA])

    @lambda_.setter
    def lambda_(self, x: float) -> None:
        self.state_[rl.STATE_LAMBDA] = float(x)

    @property
    def mu_(self) -> float:
        return float(self.state_[rl.STATE_MU])

    @mu_.setter
    def mu_(self, x: float) -> None:
        self.state_[rl.STATE_MU] = float(x)

    # -- protocol
    def fit(self, context: TrainingContext) -> BidRule:
        """Learn from the training window only; returns self."""
        self.curve_ = context.uniform_curve()
        self.fitted_ = True
        return self

    def start(self) -> np.ndarray:
        """State at the start of the replay (state[0] lambda, state[1] mu)."""
        return self.state_

    def update(self, feedback: IntervalFeedback) -> None:
        """Move the state after one interval. Default: the rule's numba update."""
        fn = type(self).numba_update  # class attribute: not bound to self
        if fn is not None:
            fn(self.state_, self.params_, feedback.fb)
