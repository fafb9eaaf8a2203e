"""The rule contract (replay.testing.check_rule) for every built-in rule and a user's rule."""

from __future__ import annotations

import textwrap

import pytest

from replay.errors import UsageError
from replay.rules.registry import get_rule, list_rules, make_rule
from replay.testing import check_rule

USER_RULE = textwrap.dedent('''
    """A user's own rule in plain Python: a proportional pacer on the cumulative error."""
    import math

    from replay.rules.base import POSITIVE, BidRule, Param


    class LinearPacer(BidRule):
        name = "linear-pacer"
        summary = "lambda follows the cumulative pacing error"
        gain = Param(3.0, "per budget share", "log-lambda per budget share behind", POSITIVE)

        def fit(self, context):
            super().fit(context)
            n = len(context.train)
            self.base_ = 1.0
            if n:
                # Average ratio value/price of training rows, a crude starting point.
                p = context.train.min_win_price
                v = context.train.value
                ok = p > 0
                if ok.any():
                    self.base_ = float((v[ok] / p[ok]).mean())
            return self

        def start(self):
            self.lambda_ = self.base_
            return self.state_

        def update(self, feedback):
            e = (feedback.cum_target - feedback.cum_spend) / feedback.budget
            self.lambda_ = self.base_ * math.exp(max(-30.0, min(30.0, -self.gain * e)))
''')


@pytest.mark.parametrize("cls", list_rules(), ids=lambda c: c.name)
def test_builtin_rule_passes_contract(cls) -> None:
    summary = check_rule(cls)
    assert summary["replays"] > 10


def test_user_rule_from_file_passes_contract(tmp_path) -> None:
    path = tmp_path / "my_rule.py"
    path.write_text(USER_RULE)
    cls = get_rule(f"{path}:LinearPacer")
    assert cls.name == "linear-pacer"
    assert check_rule(cls, gain=2.0)["replays"] > 10


def test_contract_rejects_a_rule_that_overspends(tmp_path) -> None:
    # A rule whose engine bids after exhaustion cannot exist (the loop enforces the budget),
    # but a rule that returns a negative lambda must be refused with a clear error.
    path = tmp_path / "bad_rule.py"
    path.write_text(textwrap.dedent('''
        from replay.rules.base import BidRule

        class Negative(BidRule):
            name = "negative"
            def update(self, feedback):
                self.lambda_ = -1.0
    '''))
    cls = get_rule(f"{path}:Negative")
    with pytest.raises(UsageError, match="finite and >= 0"):
        check_rule(cls)


def test_registry_errors_name_the_problem(tmp_path) -> None:
    with pytest.raises(UsageError, match="unknown rule 'nope'.*dual-mirror"):
        get_rule("nope")
    with pytest.raises(UsageError, match="unknown parameter 'stepp'.*step"):
        make_rule("dual-gradient", {"stepp": "0.1"})
    with pytest.raises(UsageError, match="'step' = '-1'.*\\(0, inf\\)"):
        make_rule("dual-mirror", {"step": "-1"})
    with pytest.raises(UsageError, match="'target'.*uniform\\|traffic"):
        make_rule("pid", {"target": "linear"})
    with pytest.raises(UsageError, match="'retarget'.*true\\|false"):
        make_rule("ftl", {"retarget": "maybe"})
    with pytest.raises(UsageError, match="'bids'"):
        make_rule("fixed-bid", {"bids": "feed:-2"})
    with pytest.raises(UsageError, match="file not found"):
        get_rule(str(tmp_path / "missing.py") + ":X")
    (tmp_path / "plain.py").write_text("class X:\n    pass\n")
    with pytest.raises(UsageError, match="not a subclass"):
        get_rule(str(tmp_path / "plain.py") + ":X")


def test_params_from_strings_are_parsed() -> None:
    rule = make_rule("dual-gradient", {"step": "0.2", "normalize": "false",
                                       "feedback": "realized"})
    assert rule.get_params()["step"] == 0.2
    assert rule.get_params()["normalize"] is False
    bid = make_rule("fixed-bid", {"bids": "feed:0.01,partner:0.02"})
    assert bid.bids == {"feed": 0.01, "partner": 0.02}
