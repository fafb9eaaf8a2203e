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


# --------------------------------------------------------------------------- fused builds
# The replay loop with a rule's update compiled in is a generated module per update
# function (``replay.kernels._fused_build``), cached on disk under a digest of its inputs.

USER_RULE = '''
import numpy as np
from numba import njit

from replay.kernels.replay_loop import FB_SPEND, FB_TARGET
from replay.rules.base import BidRule


@njit
def step_update(state, params, fb):
    # bid less after an interval over its target, more after one under it
    state[0] = state[0] * (1.25 if fb[FB_SPEND] > fb[FB_TARGET] else 0.8)


class Stepper(BidRule):
    name = "stepper"
    numba_update = step_update

    def start(self):
        self.state_ = np.array([LAMBDA0, 0.0, np.nan])
        return self.state_
'''

RUN_USER_RULE = '''
import json, sys
sys.path.insert(0, sys.argv[1])
from fused_user_rule import Stepper
from replay.engines.campaign import Schedule, replay_campaign
from replay.kernels import replay_loop as rl
from replay.schema import CampaignSpec
from replay.testing import contract_data

data = contract_data(n=3000)
cut = int(data.ts_us[0] + 0.3 * (data.ts_us[-1] - data.ts_us[0]))
r = replay_campaign(data.window(cut, None), data.window(None, cut), CampaignSpec("c", 2.0),
                    Stepper(), Schedule(every_n=25), path=sys.argv[2])
stats = rl.fused_loop(Stepper.numba_update).stats
print(json.dumps({"spend": r.totals["spend"].hex(), "wins": r.totals["wins"],
                  "hits": sum(stats.cache_hits.values()),
                  "misses": sum(stats.cache_misses.values())}))
'''


def _user_rule_dir(tmp_path: Path, lambda0: float) -> Path:
    folder = tmp_path / "rules"
    folder.mkdir(exist_ok=True)
    (folder / "fused_user_rule.py").write_text(USER_RULE.replace("LAMBDA0", repr(lambda0)))
    return folder


def _run_user_rule(folder: Path, cache: Path, path: str) -> dict:
    import json
    import os
    import subprocess
    import sys

    env = {**os.environ, "REPLAY_CACHE_DIR": str(cache)}
    out = subprocess.run([sys.executable, "-c", RUN_USER_RULE, str(folder), path], env=env,
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_a_users_update_is_compiled_once_then_loaded_from_disk(tmp_path: Path) -> None:
    # The check numba's documentation gives for its cache ("Cache Notes": dispatcher
    # ``stats.cache_hits``/``cache_misses``), run as the CLI runs: one process each.
    folder, cache = _user_rule_dir(tmp_path, 40.0), tmp_path / "cache"
    first = _run_user_rule(folder, cache, "fused")
    second = _run_user_rule(folder, cache, "fused")
    assert (first["misses"], first["hits"]) == (1, 0)
    assert (second["misses"], second["hits"]) == (0, 1)
    assert len(list(cache.glob("fused_*.py"))) == 1
    assert len(list(cache.glob("fused_*.used"))) == 1  # the use is marked for pruning
    # the same rule through the generic path (its Python update calls the numba one)
    generic = _run_user_rule(folder, cache, "generic")
    assert first["wins"] > 0
    assert first["spend"] == second["spend"] == generic["spend"]
    assert first["wins"] == second["wins"] == generic["wins"]


def test_a_build_is_named_by_the_updates_source(tmp_path: Path, monkeypatch) -> None:
    import importlib
    import sys

    from replay.kernels import _fused_build

    folder = _user_rule_dir(tmp_path, 40.0)
    monkeypatch.syspath_prepend(str(folder))
    module = importlib.import_module("fused_user_rule")
    try:
        name = _fused_build._import_name(module.step_update)
        assert name is not None and name[:2] == ("fused_user_rule", "step_update")
        text = _fused_build.loop_source("from fused_user_rule import step_update as "
                                        "update_inline", True, cache=True)
        assert "ONE_ROW = True" in text and "@njit(cache=True, nogil=True)" in text
        before = _fused_build._digest(text, name[2])
        _user_rule_dir(tmp_path, 41.0)  # the user edits the rule file
        assert _fused_build._digest(text, name[2]) != before
    finally:
        sys.modules.pop("fused_user_rule", None)


def test_an_update_without_an_import_name_is_built_in_memory(tmp_path: Path,
                                                             monkeypatch) -> None:
    import numpy as np
    from numba import njit

    from replay.engines.campaign import Schedule, replay_campaign
    from replay.kernels import _fused_build
    from replay.rules.base import BidRule
    from replay.schema import CampaignSpec
    from replay.testing import contract_data

    monkeypatch.setenv(_fused_build.CACHE_ENV, str(tmp_path))

    @njit
    def local_update(state, params, fb):
        state[0] = state[0] * (1.25 if fb[replay_loop.FB_SPEND] > fb[replay_loop.FB_TARGET]
                               else 0.8)

    class Local(BidRule):
        name = "local"
        numba_update = local_update

        def start(self):
            self.state_ = np.array([40.0, 0.0, np.nan])
            return self.state_

    assert _fused_build._import_name(local_update) is None
    loop = replay_loop.fused_loop(local_update)
    assert loop.py_func.__module__ == "replay_fused_in_memory"
    data = contract_data(n=3000)
    cut = int(data.ts_us[0] + 0.3 * (data.ts_us[-1] - data.ts_us[0]))
    train, replay = data.window(None, cut), data.window(cut, None)
    runs = [replay_campaign(replay, train, CampaignSpec("c", 2.0), Local(), Schedule(every_n=25),
                            path=path).totals for path in ("fused", "generic")]
    assert runs[0]["wins"] > 0
    assert (runs[0]["spend"], runs[0]["wins"]) == (runs[1]["spend"], runs[1]["wins"])
    assert not list(tmp_path.glob("fused_*.py"))


def test_builds_unused_for_a_month_are_pruned(tmp_path: Path) -> None:
    import os
    import time

    from replay.kernels import _fused_build

    cache = tmp_path / "__pycache__"
    cache.mkdir()
    old = time.time() - (_fused_build.PRUNE_AFTER_DAYS + 1) * 86_400
    for stem in ("fused_old", "fused_old_but_used", "fused_new"):
        (tmp_path / f"{stem}.py").write_text("# a build\n")
        for suffix in (".replay_fused_loop-10.py311.nbi", ".replay_fused_loop-10.py311.1.nbc",
                       ".cpython-311.pyc"):
            (cache / f"{stem}{suffix}").write_bytes(b"x")
    for stem in ("fused_old", "fused_old_but_used"):
        os.utime(tmp_path / f"{stem}.py", (old, old))
    (tmp_path / "fused_old_but_used.used").touch()  # loaded recently
    (tmp_path / "unrelated.py").write_text("# not a build\n")
    os.utime(tmp_path / "unrelated.py", (old, old))

    assert _fused_build.prune_builds(tmp_path) == ["old"]
    left = sorted(p.name for p in tmp_path.rglob("*") if p.is_file())
    assert not [n for n in left if n.startswith("fused_old.") or n == "fused_old.py"]
    assert "fused_old_but_used.py" in left and "fused_new.py" in left
    assert "unrelated.py" in left
    assert sum(n.startswith("fused_old_but_used.") for n in left) == 5  # .py .used + 3
