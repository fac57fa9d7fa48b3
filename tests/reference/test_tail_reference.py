"""The tail calibration against scipy.stats (a reference for tests, not a runtime
dependency): the generalised Pareto fitted by probability-weighted moments (Hosking &
Wallis 1987) recovers a known tail, and its levels agree with scipy's distribution."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from agent.commission.tail import GpdFit, calibrate_tail, fit_gpd_pwm, target_exceedance


@pytest.mark.parametrize("xi", [-0.2, 0.0, 0.2])
def test_pwm_recovers_a_known_gpd(xi: float) -> None:
    """PWM shape and scale of 20,000 draws are within sampling error of the truth."""
    y = stats.genpareto.rvs(c=xi, scale=2.0, size=20_000, random_state=np.random.default_rng(1))
    got_xi, got_sigma = fit_gpd_pwm(y)
    assert got_xi == pytest.approx(xi, abs=0.05)
    assert got_sigma == pytest.approx(2.0, rel=0.05)


def test_pwm_agrees_with_scipy_mle_fit() -> None:
    """On one sample, the PWM fit and scipy's maximum-likelihood fit give close levels."""
    y = stats.genpareto.rvs(c=0.1, scale=1.0, size=5_000, random_state=np.random.default_rng(2))
    xi, sigma = fit_gpd_pwm(y)
    c, _, scale = stats.genpareto.fit(y, floc=0)
    for p in (1e-2, 1e-3):
        ours = GpdFit(u=0.0, xi=xi, sigma=sigma, zeta=1.0, n_excess=y.size).level(p)
        ref = stats.genpareto.ppf(1 - p, c, 0, scale)
        assert ours == pytest.approx(ref, rel=0.1)


def test_level_and_exceedance_are_scipys_quantile_and_survival() -> None:
    """GpdFit.level / exceedance are u + genpareto.ppf / zeta * genpareto.sf."""
    f = GpdFit(u=3.0, xi=0.15, sigma=0.7, zeta=0.2, n_excess=50)
    for p in (0.1, 0.01, 1e-4):
        ref = 3.0 + stats.genpareto.ppf(1 - p / 0.2, 0.15, 0, 0.7)
        assert f.level(p) == pytest.approx(ref, rel=1e-9)
        assert f.exceedance(f.level(p)) == pytest.approx(p, rel=1e-9)


def test_threshold_meets_the_budget_on_a_long_iid_recording() -> None:
    """Independent Gamma scores, tumbling windows: the threshold sits at the Gamma quantile
    the budget asks for (before the margin), within the tail fit's error."""
    rng = np.random.default_rng(3)
    s = stats.gamma.rvs(a=2.0, size=20_000, random_state=rng)
    cal = calibrate_tail(s, length_s=10, hop_s=10, raise_k=2, raise_n=3, margin=1.0)
    assert cal.method == "pot-gpd" and cal.promised
    p = target_exceedance(1.0, 10, 2, 3)
    assert cal.threshold == pytest.approx(stats.gamma.ppf(1 - p, a=2.0), rel=0.1)
    assert cal.expected_per_week == pytest.approx(1.0, rel=0.5)


def test_short_recording_says_it_cannot_promise() -> None:
    """Ten independent windows cannot support 1 false alarm a week: fallback, reasons."""
    s = np.random.default_rng(4).gamma(2.0, size=200)
    cal = calibrate_tail(s, length_s=20, hop_s=1, raise_k=2, raise_n=3)
    assert cal.method == "max-margin" and not cal.promised
    assert cal.expected_per_week is None
    assert cal.threshold == pytest.approx(1.25 * s.max())
    assert cal.needed_independent > cal.n_independent
    assert any("would be needed" in r for r in cal.reasons)
