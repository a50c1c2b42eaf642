"""The sample-ratio check of an A/B split: do the observed arm counts fit the weights?

Pearson's chi-square statistic of the counts against the configured shares, with its p-value
from the chi-square distribution with (arms - 1) degrees of freedom. The p-value is the
regularised upper incomplete gamma function Q(k/2, x/2), computed here by its power series or
its continued fraction (the classical pair of expansions, each used where it converges fast), so
the service needs no SciPy; the tests compare it with ``scipy.stats.chi2.sf``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

_EPS = 1e-15
_MAX_TERMS = 10_000


@dataclass(frozen=True)
class RatioCheck:
    statistic: float
    dof: int
    p_value: float


def sample_ratio(observed: Sequence[int], weights: Sequence[float]) -> RatioCheck | None:
    """Chi-square goodness of fit of arm counts to weights; None with one arm or no traffic."""
    if len(observed) != len(weights):
        raise ValueError("one count per weight")
    total, weight_sum = sum(observed), sum(weights)
    if len(observed) < 2 or total == 0 or weight_sum <= 0:
        return None
    statistic = 0.0
    for count, weight in zip(observed, weights, strict=True):
        expected = total * weight / weight_sum
        if expected > 0:
            statistic += (count - expected) ** 2 / expected
        elif count > 0:  # traffic on an arm with weight 0 cannot come from these weights
            return RatioCheck(math.inf, len(observed) - 1, 0.0)
    dof = len(observed) - 1
    return RatioCheck(statistic, dof, chi2_sf(statistic, dof))


def chi2_sf(x: float, dof: int) -> float:
    """P(X >= x) for X chi-square with ``dof`` degrees of freedom."""
    if dof < 1:
        raise ValueError("dof must be >= 1")
    if x <= 0:
        return 1.0
    if math.isinf(x):
        return 0.0
    return _gamma_q(dof / 2.0, x / 2.0)


def _gamma_q(a: float, x: float) -> float:
    """Regularised upper incomplete gamma Q(a, x) for a > 0, x > 0."""
    log_prefix = a * math.log(x) - x - math.lgamma(a)
    if x < a + 1.0:
        # Series: P(a, x) = e^-x x^a / Gamma(a + 1) * sum_n x^n / ((a + 1) ... (a + n)).
        term = total = 1.0 / a
        denominator = a
        for _ in range(_MAX_TERMS):
            denominator += 1.0
            term *= x / denominator
            total += term
            if abs(term) < abs(total) * _EPS:
                break
        return max(0.0, 1.0 - total * math.exp(log_prefix))
    # Continued fraction for Q (modified Lentz): 1 / (x + 1 - a - 1(1 - a) / (x + 3 - a - ...)).
    tiny = 1e-300
    b = x + 1.0 - a
    c = 1.0 / tiny
    d = 1.0 / b
    h = d
    for i in range(1, _MAX_TERMS):
        an = -i * (i - a)
        b += 2.0
        d = an * d + b
        d = tiny if abs(d) < tiny else d
        c = b + an / c
        c = tiny if abs(c) < tiny else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < _EPS:
            break
    return math.exp(log_prefix) * h
