"""Cached numba code that goes stale with any kernel or rule source, not only its own file.

numba keys a function's cache on its own source file (its documentation, "Notes on
Caching", lists this among the caching limitations). A kernel that inlines a function
from another module (``shade`` in the replay loop) or reads another module's constant
(``FB_*`` in a rule's update) would otherwise keep running old code after that module
changed, and return old results without a word. Here every function defined under
``replay/kernels`` or ``replay/rules`` is stamped with one digest of all the source files
in those two folders, so editing any of them recompiles all of them on next use.

``install()`` runs when ``replay.kernels`` is imported, before any kernel is defined.
Functions outside the package (a user's own rule) keep numba's usual stamp.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from numba.core import caching

#: The folders whose sources stamp the cached code.
STAMPED_DIRS = (Path(__file__).resolve().parent, Path(__file__).resolve().parent.parent / "rules")


def source_digest() -> str:
    """SHA-256 over the names and bytes of every ``.py`` file in ``STAMPED_DIRS``."""
    h = hashlib.sha256()
    for folder in STAMPED_DIRS:
        for path in sorted(folder.glob("*.py")):
            h.update(f"{folder.name}/{path.name}".encode())
            h.update(b"\0")
            h.update(path.read_bytes())
            h.update(b"\0")
    return h.hexdigest()


_DIGEST = source_digest()


def _stamped(py_file: str) -> bool:
    try:
        return Path(py_file).resolve().parent in STAMPED_DIRS
    except OSError:
        return False


class _DigestStamp:
    """Mixin over a numba locator: the stamp is the package digest."""

    def get_source_stamp(self) -> str:
        return _DIGEST

    @classmethod
    def from_function(cls, py_func, py_file):
        if not _stamped(py_file):
            return None
        return super().from_function(py_func, py_file)


def _numba_class(*names: str):
    for name in names:  # numba renamed these classes (leading underscore before 0.62)
        if hasattr(caching, name):
            return getattr(caching, name)
    return None


def install() -> bool:
    """Put digest-stamped locators first in numba's list (once); False if this numba
    version does not have the classes (numba's own stamp then applies)."""
    impl = _numba_class("CacheImpl", "_CacheImpl")
    bases = [_numba_class(f"{n}CacheLocator", f"_{n}CacheLocator")
             for n in ("UserProvided", "InTree", "UserWide")]
    if impl is None or any(b is None for b in bases):
        return False
    current = impl._locator_classes
    if any(getattr(c, "_replay_digest", False) for c in current):
        return True
    ours = [type(f"Digest{b.__name__.lstrip('_')}", (_DigestStamp, b), {"_replay_digest": True})
            for b in bases]
    impl._locator_classes = ours + list(current)
    return True


INSTALLED = install()
