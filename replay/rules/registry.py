"""Rule names -> classes. Built-in rules by name; a user's class by ``module:Class``.

``module`` is a dotted import path (``mypkg.rules:MyRule``) or a Python file
(``./my_rule.py:MyRule``).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from pathlib import Path

from replay.errors import UsageError
from replay.rules.base import BidRule
from replay.rules.dual_gradient import DualGradient
from replay.rules.dual_mirror import DualMirror
from replay.rules.fixed_bid import FixedBid
from replay.rules.fixed_multiplier import FixedMultiplier
from replay.rules.ftl import FollowTheLeader
from replay.rules.pid import Pid

BUILTIN: tuple[type[BidRule], ...] = (
    FixedMultiplier, FixedBid, FollowTheLeader, DualGradient, DualMirror, Pid,
)
_BY_NAME = {cls.name: cls for cls in BUILTIN}


def list_rules() -> list[type[BidRule]]:
    """The built-in rules, in listing order."""
    return list(BUILTIN)


def _load_module(spec: str):
    if spec.endswith(".py") or "/" in spec or "\\" in spec:
        path = Path(spec).expanduser().resolve()
        if not path.is_file():
            raise UsageError(f"--rule {spec}: file not found")
        digest = hashlib.sha1(str(path).encode()).hexdigest()[:12]
        mod_name = f"replay_user_rule_{digest}"
        loader = importlib.util.spec_from_file_location(mod_name, path)
        if loader is None or loader.loader is None:
            raise UsageError(f"--rule {spec}: not a Python file")
        module = importlib.util.module_from_spec(loader)
        sys.modules[mod_name] = module
        try:
            loader.loader.exec_module(module)
        except Exception as exc:  # the user's code: report it in one line
            sys.modules.pop(mod_name, None)
            raise UsageError(f"--rule {spec}: importing failed: {exc!r}") from None
        return module
    try:
        return importlib.import_module(spec)
    except ImportError as exc:
        raise UsageError(f"--rule {spec}: cannot import module ({exc})") from None


def get_rule(name_or_path: str) -> type[BidRule]:
    """The rule class for a built-in name or ``module:ClassName`` (UsageError otherwise)."""
    key = str(name_or_path).strip()
    if key in _BY_NAME:
        return _BY_NAME[key]
    if ":" in key:
        module_part, _, cls_name = key.rpartition(":")
        module = _load_module(module_part)
        cls = getattr(module, cls_name, None)
        if cls is None:
            raise UsageError(f"--rule {key}: module has no class {cls_name!r}")
        if not (isinstance(cls, type) and issubclass(cls, BidRule)):
            raise UsageError(f"--rule {key}: {cls_name} is not a subclass of "
                             "replay.rules.base.BidRule")
        if not cls.name:
            cls.name = cls_name
        return cls
    raise UsageError(f"unknown rule {key!r}; allowed: {', '.join(_BY_NAME)} or "
                     "path.to.module:ClassName")


def make_rule(name_or_path: str, params: dict | None = None) -> BidRule:
    """Build a rule from its name and parameters (strings from ``--set`` are parsed)."""
    return get_rule(name_or_path)(**(params or {}))
