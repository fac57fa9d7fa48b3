"""Thresholds from the tail of later normal scores, against an alarm budget.

Pure: values in, values out.

The question a threshold answers is "how often will this model raise on normal
running it has not seen?", so the scores it comes from are those of the *later*
part of the recording, scored by a model fitted on the earlier part (forward
validation; `train.py` makes the split).

From a false-alarm budget to a per-window level
-----------------------------------------------
The detector raises when `k` of the last `n` independent windows are above the
threshold (hopping windows are stretched to the same span:
`DetectorParams.over_windows`). If each independent window exceeds with probability
`p`, and exceedances were independent, raises per week are about
`W * C(n, k) * p**k`, with `W = 604800 / length_s` independent windows a week. So a
budget of `B` false alarms per asset-week needs
`p* = (B / (W * C(n, k))) ** (1 / k)`. Real exceedances cluster (normal running
drifts), so the independence is optimistic; the forward split is what puts that drift
into the scores the threshold comes from.

From the scores to the threshold at p*
--------------------------------------
Scores of overlapping windows are near-duplicates, so they are *declustered* first:
the maximum of every run of `w = ceil(length_s / hop_s)` consecutive windows is one
independent observation. Above a high quantile `u` of those maxima the excesses follow
a generalised Pareto distribution (Pickands-Balkema-de Haan; peaks over threshold, see
Coles 2001, "An Introduction to Statistical Modeling of Extreme Values", ch. 4). Its
shape and scale are estimated by probability-weighted moments (Hosking and Wallis
1987, Technometrics 29:339), closed-form and stable on small samples; the level with
exceedance probability `p*` is then
`u + sigma / xi * ((zeta / p*) ** xi - 1)`, `zeta` the share of maxima above `u`.

What the recording can promise
------------------------------
A GPD fit needs enough exceedances (at least `MIN_EXCESSES`, common practice, no
source) and may be extrapolated only so far beyond the data (at most `MAX_EXTRAPOLATION`
times below the empirical resolution `1 / N`, common practice, no source). When the
later part of the recording cannot support `p*`, the threshold falls back to the
largest later-normal score times the margin, the budget is reported as *not promised*,
and the report says how much recording would be needed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from agent.errors import DatasetError

WEEK_S = 7 * 86400.0
DEFAULT_BUDGET_PER_WEEK = 1.0
DEFAULT_MARGIN = 1.25
DEFAULT_CLEAR_RATIO = 0.8
TAIL_QUANTILE = 0.8        # u: the 80th percentile of the declustered maxima
MIN_EXCESSES = 20
MAX_EXTRAPOLATION = 10.0
MIN_FORWARD_WINDOWS = 10


@dataclass(frozen=True)
class GpdFit:
    """Generalised Pareto excesses over `u`: shape `xi`, scale `sigma`, share `zeta`."""

    u: float
    xi: float
    sigma: float
    zeta: float
    n_excess: int

    def level(self, p: float) -> float:
        """The score exceeded with probability `p` (p <= zeta)."""
        r = self.zeta / p
        if abs(self.xi) < 1e-9:
            return self.u + self.sigma * math.log(r)
        return self.u + self.sigma / self.xi * (r ** self.xi - 1.0)

    def exceedance(self, t: float) -> float:
        """P(score > t) for t >= u."""
        if t <= self.u:
            return self.zeta
        y = (t - self.u) / self.sigma
        if abs(self.xi) < 1e-9:
            return self.zeta * math.exp(-y)
        base = 1.0 + self.xi * y
        if base <= 0.0:
            return 0.0
        return self.zeta * base ** (-1.0 / self.xi)


def fit_gpd_pwm(excesses: np.ndarray) -> tuple[float, float]:
    """(xi, sigma) of a generalised Pareto fitted to positive `excesses` by
    probability-weighted moments (Hosking & Wallis 1987; valid for xi < 0.5).

    With CDF F(y) = 1 - (1 + xi*y/sigma)^(-1/xi) and k = -xi:
    a0 = E[Y] = sigma/(1+k), a1 = E[Y(1-F)] = sigma/(2(2+k)), so
    k = a0/(a0 - 2 a1) - 2 and sigma = 2 a0 a1 / (a0 - 2 a1).
    """
    y = np.sort(np.asarray(excesses, dtype=np.float64))
    n = y.size
    if n < 2 or not np.all(np.isfinite(y)):
        raise ValueError("need at least two finite excesses")
    pp = (np.arange(1, n + 1) - 0.35) / n  # plotting positions (Hosking & Wallis)
    a0 = float(y.mean())
    a1 = float(np.mean((1.0 - pp) * y))
    d = a0 - 2.0 * a1
    if not d > 0.0:
        raise ValueError("excesses too heavy-tailed for PWM (xi >= 0.5)")
    k = a0 / d - 2.0
    sigma = 2.0 * a0 * a1 / d
    return -k, sigma


def decluster(scores: np.ndarray, windows_per_length: int) -> np.ndarray:
    """The maximum of every run of `windows_per_length` consecutive scores."""
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    w = max(1, int(windows_per_length))
    m = s.size // w
    if m == 0:
        return s[:0]
    return s[: m * w].reshape(m, w).max(axis=1)


def target_exceedance(budget_per_week: float, length_s: float, raise_k: int,
                      raise_n: int) -> float:
    """p*: the per-independent-window exceedance at which k-of-n raises about
    `budget_per_week` times a week (see the module docstring)."""
    w_week = WEEK_S / length_s
    return float((budget_per_week / (w_week * math.comb(raise_n, raise_k))) ** (1.0 / raise_k))


def alarms_per_week(p: float, length_s: float, raise_k: int, raise_n: int) -> float:
    """Expected raises a week on normal running at per-window exceedance `p`."""
    return WEEK_S / length_s * math.comb(raise_n, raise_k) * p ** raise_k


@dataclass(frozen=True)
class TailCalibration:
    """Both thresholds, what they promise, and how they were obtained."""

    threshold: float
    clear_threshold: float
    method: str                  # "pot-gpd" or "max-margin"
    budget_per_week: float
    promised: bool
    expected_per_week: float | None
    target_exceedance: float
    n_windows: int
    n_independent: int
    margin: float
    clear_ratio: float
    median_score: float
    max_score: float
    fit: GpdFit | None
    needed_independent: int
    reasons: tuple[str, ...] = field(default=())

    @property
    def quantile(self) -> float:
        return 1.0 - self.target_exceedance

    def as_json(self) -> dict[str, Any]:
        doc: dict[str, Any] = {
            "method": self.method, "validation": "forward",
            "false_alarm_budget_per_week": self.budget_per_week,
            "budget_promised": self.promised,
            "expected_false_alarms_per_week": (None if self.expected_per_week is None
                                               else float(f"{self.expected_per_week:.4g}")),
            "target_exceedance_per_window": self.target_exceedance,
            "n_windows": self.n_windows, "n_independent_windows": self.n_independent,
            "needed_independent_windows": self.needed_independent,
            "margin": self.margin, "clear_ratio": self.clear_ratio,
            "median_score": self.median_score, "max_score": self.max_score,
            "reasons": list(self.reasons),
        }
        if self.fit is not None:
            doc["gpd"] = {"u": self.fit.u, "xi": self.fit.xi, "sigma": self.fit.sigma,
                          "zeta": self.fit.zeta, "n_excess": self.fit.n_excess}
        return doc


def needed_independent(p_star: float) -> int:
    """Independent later-normal windows needed to support p* (see MAX_EXTRAPOLATION,
    MIN_EXCESSES and TAIL_QUANTILE)."""
    by_extrapolation = 1.0 / (MAX_EXTRAPOLATION * p_star)
    by_excesses = MIN_EXCESSES / (1.0 - TAIL_QUANTILE)
    return math.ceil(max(by_extrapolation, by_excesses))


def calibrate_tail(scores: np.ndarray, *, length_s: float, hop_s: float, raise_k: int,
                   raise_n: int, budget_per_week: float = DEFAULT_BUDGET_PER_WEEK,
                   margin: float = DEFAULT_MARGIN,
                   clear_ratio: float = DEFAULT_CLEAR_RATIO) -> TailCalibration:
    """Thresholds from time-ordered later-normal `scores` (see the module docstring).

    Raises ValueError for settings out of range and DatasetError when the scores
    cannot support any threshold (too few, non-finite, all zero).
    """
    if not budget_per_week > 0:
        raise ValueError("the false-alarm budget must be > 0 per week")
    if not margin >= 1.0:
        raise ValueError("margin must be >= 1 (a margin below 1 raises on normal data)")
    if not 0.0 < clear_ratio <= 1.0:
        raise ValueError("clear_ratio must be in (0, 1]")
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    w = max(1, math.ceil(length_s / hop_s - 1e-9))
    _check_scores(s, w, length_s)
    maxima = decluster(s, w)
    n_ind = int(maxima.size)
    p_star = target_exceedance(budget_per_week, length_s, raise_k, raise_n)
    need = needed_independent(p_star)
    reasons: list[str] = []
    fit = _tail_fit(maxima, reasons)
    promised = fit is not None and p_star * MAX_EXTRAPOLATION * n_ind >= 1.0
    if fit is not None and not promised:
        reasons.append(f"the budget needs a per-window rate of {p_star:.2g}, more than "
                       f"{MAX_EXTRAPOLATION:g}x beyond what {n_ind} independent windows show")
    if promised and fit is not None:
        method = "pot-gpd"
        base = fit.level(p_star)
    else:
        method = "max-margin"
        base = float(s.max())
    threshold = base * margin
    expected: float | None = None
    if fit is not None:
        expected = alarms_per_week(fit.exceedance(threshold), length_s, raise_k, raise_n)
    if not promised:
        reasons.append(f"about {need} independent windows of later normal running "
                       f"({need * length_s / 3600:.1f} h at {length_s:g} s windows) would be "
                       "needed to promise it")
    median = float(np.median(s))
    clear = min(threshold, max(clear_ratio * threshold, median))
    return TailCalibration(
        threshold=float(threshold), clear_threshold=float(clear), method=method,
        budget_per_week=float(budget_per_week), promised=bool(promised),
        expected_per_week=expected if promised else None, target_exceedance=p_star,
        n_windows=int(s.size), n_independent=n_ind, margin=float(margin),
        clear_ratio=float(clear_ratio), median_score=median, max_score=float(s.max()),
        fit=fit, needed_independent=need, reasons=tuple(reasons))


def _check_scores(s: np.ndarray, w: int, length_s: float) -> None:
    """DatasetError when the scores cannot support a threshold: too few independent
    windows (`w` windows per window length), non-finite values, all zero."""
    if s.size < MIN_FORWARD_WINDOWS * w:
        raise DatasetError(
            f"only {s.size} later-normal window(s) to calibrate on ({s.size // w} independent "
            f"of {length_s:g} s); at least {MIN_FORWARD_WINDOWS} independent windows "
            f"({MIN_FORWARD_WINDOWS * w} windows at this hop) are needed: a threshold from "
            "fewer says nothing about the next hours. Record for longer, or give a larger "
            "--calib-fraction")
    if not np.all(np.isfinite(s)):
        raise DatasetError("later-normal scores contain non-finite values")
    if not float(s.max()) > 0.0:
        raise DatasetError("later-normal scores are all zero: the data has nothing the "
                           "model cannot reproduce, so no threshold can be set")


def _tail_fit(maxima: np.ndarray, reasons: list[str]) -> GpdFit | None:
    """A GPD fit to the excesses of the declustered maxima over their `TAIL_QUANTILE`,
    or None (with the reason) when there are too few or the fit fails."""
    n_ind = int(maxima.size)
    n_exc = int(np.sum(maxima > np.quantile(maxima, TAIL_QUANTILE)))
    if n_exc < MIN_EXCESSES:
        reasons.append(f"{n_ind} independent later-normal windows give {n_exc} tail "
                       f"excesses; a tail fit needs {MIN_EXCESSES}")
        return None
    u = float(np.quantile(maxima, TAIL_QUANTILE))
    exc = maxima[maxima > u] - u
    try:
        xi, sigma = fit_gpd_pwm(exc)
    except ValueError as e:
        reasons.append(f"no tail fit: {e}")
        return None
    return GpdFit(u=u, xi=xi, sigma=sigma, zeta=exc.size / n_ind, n_excess=int(exc.size))
