"""Cached numba code is stamped with a digest of every kernel and rule source.

numba's developer documentation ("Notes on Caching", section "Caching Limitations") says
cache invalidation fails to recognize changes in symbols defined in a different file, and
that global variables are frozen into the cached code: a kernel that inlines another
module's function, or a rule reading the loop's FB_* constants, would keep stale code.
These checks pin our stamp over all kernel and rule sources.
"""

from __future__ import annotations

from pathlib import Path

from replay.kernels import _cache, landscape, replay_loop
from replay.rules import dual_gradient


def test_kernels_and_rule_updates_are_stamped_with_the_source_digest() -> None:
    assert _cache.INSTALLED
    digest = _cache.source_digest()
    for fn in (landscape.shade, replay_loop.shade_fast, dual_gradient.dual_gradient_update):
        locator = fn._cache._impl.locator
        assert locator.get_source_stamp() == digest, fn


def test_digest_changes_when_any_stamped_file_changes(tmp_path: Path, monkeypatch) -> None:
    kernels, rules = tmp_path / "kernels", tmp_path / "rules"
    kernels.mkdir()
    rules.mkdir()
    (kernels / "a.py").write_text("X = 1\n")
    (rules / "b.py").write_text("Y = 2\n")
    (rules / "notes.txt").write_text("not a source file\n")
    monkeypatch.setattr(_cache, "STAMPED_DIRS", (kernels, rules))
    before = _cache.source_digest()
    (rules / "notes.txt").write_text("changed\n")
    assert _cache.source_digest() == before
    (rules / "b.py").write_text("Y = 3\n")
    assert _cache.source_digest() != before


def test_functions_outside_the_package_keep_numbas_stamp(tmp_path: Path) -> None:
    assert _cache._stamped(replay_loop.__file__)
    assert not _cache._stamped(str(tmp_path / "my_rule.py"))
