"""The bench's reference pass agrees with a plain numpy computation of the same quantity."""

import numpy as np

from replay.kernels.reference import reference_pass


def test_reference_pass_matches_numpy() -> None:
    # Reference: the second-price replay rule (win iff bid >= min_win_price, pay the
    # min_win_price) written directly in numpy; common practice.
    rng = np.random.default_rng(3)
    value = rng.exponential(0.02, 5000)
    price = rng.lognormal(-6.0, 1.0, 5000)
    multiplier = 0.15
    spend, results, wins = reference_pass(value, price, multiplier)
    won = value * multiplier >= price
    assert wins == int(won.sum())
    assert np.isclose(spend, price[won].sum(), rtol=1e-12)
    assert np.isclose(results, value[won].sum(), rtol=1e-12)
