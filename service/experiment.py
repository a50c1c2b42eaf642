"""The statistics of the experiment report: per arm a mean with its Student t interval and label
shares with Wilson score intervals; between an arm and the control arm, Welch's unequal-variances
t-test on the means and Pearson's chi-square on the 2x2 table of each label.

Pure functions on counts and moments, no web or store imports, and no SciPy at run time: the
Student t tail is the regularized incomplete beta function, I_x(a, b), evaluated by its continued
fraction with the modified Lentz method (Press et al., Numerical Recipes, 3rd ed., section 6.4;
Lentz 1976), with log B(a, b) by the Stirling-series correction for large arguments (the method
of R's ``lbeta``, after Didonato & Morris 1992) so that large degrees of freedom keep their
precision. The chi-square tail with one degree of freedom reuses ``ratio.chi2_sf``. The tests
compare everything with SciPy.

References:
- Welch, B. L. (1947). The generalization of "Student's" problem when several different
  population variances are involved. Biometrika 34, 28-35. Satterthwaite, F. E. (1946).
  An approximate distribution of estimates of variance components. Biometrics 2, 110-114.
- Wilson, E. B. (1927). Probable inference, the law of succession, and statistical inference.
  JASA 22, 209-212.
- Pearson, K. (1900), the chi-square test; on a 2x2 table without continuity correction it
  equals the square of the pooled two-proportion z statistic.
- Newcombe, R. G. (1998). Interval estimation for the difference between independent
  proportions: comparison of eleven methods. Statistics in Medicine 17, 873-890 (method 10).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from service.ratio import chi2_sf

CONFIDENCE = 0.95
# The standard normal quantile at 0.975 (scipy.stats.norm.ppf(0.975)); the tests check it.
Z_975 = 1.959963984540054

_EPS = 1e-16
_TINY = 1e-300
_MAX_ITERATIONS = 100_000
_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
# Stirling series of log Gamma: B_2k / (2k (2k - 1)), k = 1..8.
_STIRLING = (
    1.0 / 12.0,
    -1.0 / 360.0,
    1.0 / 1260.0,
    -1.0 / 1680.0,
    1.0 / 1188.0,
    -691.0 / 360360.0,
    1.0 / 156.0,
    -3617.0 / 122400.0,
)


# -- special functions -------------------------------------------------------------------------


def _lgamma_correction(x: float) -> float:
    """log Gamma(x) - ((x - 1/2) log x - x + log sqrt(2 pi)) for x >= 10 (error < 1e-17)."""
    inverse_square = 1.0 / (x * x)
    total = 0.0
    for coefficient in reversed(_STIRLING):
        total = total * inverse_square + coefficient
    return total / x


def log_beta(a: float, b: float) -> float:
    """log B(a, b) for a, b > 0, without the cancellation of lgamma differences at large a, b."""
    p, q = min(a, b), max(a, b)
    if p >= 10.0:
        correction = _lgamma_correction(p) + _lgamma_correction(q) - _lgamma_correction(p + q)
        return (
            -0.5 * math.log(q)
            + _LN_SQRT_2PI
            + correction
            + (p - 0.5) * math.log(p / (p + q))
            + q * math.log1p(-p / (p + q))
        )
    if q >= 10.0:
        correction = _lgamma_correction(q) - _lgamma_correction(p + q)
        return (
            math.lgamma(p)
            + correction
            + p
            - p * math.log(p + q)
            + (q - 0.5) * math.log1p(-p / (p + q))
        )
    return math.lgamma(p) + math.lgamma(q) - math.lgamma(p + q)


def _beta_fraction(a: float, b: float, x: float) -> float:
    """The continued fraction of I_x(a, b) (Numerical Recipes ``betacf``), modified Lentz."""
    qab, qap, qam = a + b, a + 1.0, a - 1.0
    c = 1.0
    d = 1.0 - qab * x / qap
    d = _TINY if abs(d) < _TINY else d
    d = 1.0 / d
    h = d
    for m in range(1, _MAX_ITERATIONS):
        m2 = 2 * m
        even = m * (b - m) * x / ((qam + m2) * (a + m2))
        d = 1.0 + even * d
        d = _TINY if abs(d) < _TINY else d
        c = 1.0 + even / c
        c = _TINY if abs(c) < _TINY else c
        d = 1.0 / d
        h *= d * c
        odd = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2))
        d = 1.0 + odd * d
        d = _TINY if abs(d) < _TINY else d
        c = 1.0 + odd / c
        c = _TINY if abs(c) < _TINY else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < _EPS:
            return h
    raise ArithmeticError(f"incomplete beta did not converge (a={a}, b={b}, x={x})")


def _beta_inc(a: float, b: float, x: float, y: float, log_x: float, log_y: float) -> float:
    """I_x(a, b) given x, y = 1 - x and their logarithms, each computed without cancellation
    by the caller."""
    if x <= 0.0:
        return 0.0
    if y <= 0.0:
        return 1.0
    # The fraction converges fast below the mean of the distribution; above it, use the
    # symmetry I_x(a, b) = 1 - I_y(b, a) so the fraction always computes the smaller tail.
    if x < (a + 1.0) / (a + b + 2.0):
        front = math.exp(a * log_x + b * log_y - log_beta(a, b))
        return front * _beta_fraction(a, b, x) / a
    front = math.exp(b * log_y + a * log_x - log_beta(a, b))
    return 1.0 - front * _beta_fraction(b, a, y) / b


def beta_inc(a: float, b: float, x: float) -> float:
    """The regularized incomplete beta function I_x(a, b), a, b > 0, 0 <= x <= 1."""
    if a <= 0 or b <= 0 or not 0.0 <= x <= 1.0:
        raise ValueError("expected a, b > 0 and 0 <= x <= 1")
    if x in (0.0, 1.0):
        return x
    return _beta_inc(a, b, x, 1.0 - x, math.log(x), math.log1p(-x))


def t_two_sided(t: float, dof: float) -> float:
    """P(|T| >= |t|) for T Student t with ``dof`` > 0 degrees of freedom: I_{dof/(dof+t^2)}(dof/2,
    1/2), with x and 1 - x formed separately so that neither tail loses digits."""
    if dof <= 0 or math.isnan(t):
        raise ValueError("expected dof > 0 and a number")
    if math.isinf(t):
        return 0.0
    t2 = t * t
    if t2 == 0.0:
        return 1.0
    x = dof / (dof + t2)
    y = t2 / (dof + t2)
    log_x = -math.log1p(t2 / dof)
    log_y = math.log(y) if y > 1e-300 else 2.0 * math.log(abs(t)) - math.log(dof + t2)
    return min(1.0, _beta_inc(dof / 2.0, 0.5, x, y, log_x, log_y))


def t_sf(t: float, dof: float) -> float:
    """P(T >= t) for T Student t with ``dof`` degrees of freedom."""
    half = 0.5 * t_two_sided(t, dof)
    return half if t >= 0 else 1.0 - half


def t_density(t: float, dof: float) -> float:
    """The Student t density: (1 + t^2/dof)^(-(dof+1)/2) / (sqrt(dof) B(dof/2, 1/2))."""
    return math.exp(
        -0.5 * (dof + 1.0) * math.log1p(t * t / dof)
        - 0.5 * math.log(dof)
        - log_beta(dof / 2.0, 0.5)
    )


def t_quantile(probability: float, dof: float) -> float:
    """The t with P(T <= t) = ``probability`` (0.5 <= probability < 1): Newton's method on the
    two-sided tail, kept inside a bracket that bisection shrinks whenever a step leaves it."""
    if not 0.5 <= probability < 1.0 or dof <= 0:
        raise ValueError("expected 0.5 <= probability < 1 and dof > 0")
    target = 2.0 * (1.0 - probability)  # two-sided tail at the answer
    if target >= 1.0:
        return 0.0
    low, high = 0.0, 2.0
    while t_two_sided(high, dof) > target:
        low, high = high, high * 2.0
    t = 0.5 * (low + high)
    for _ in range(200):
        excess = t_two_sided(t, dof) - target  # decreasing in t
        if excess > 0:
            low = t
        else:
            high = t
        step = excess / (2.0 * t_density(t, dof))
        guess = t + step
        if not low < guess < high:
            guess = 0.5 * (low + high)
        if abs(guess - t) <= 1e-15 * t or high - low <= 1e-15 * high:
            return guess
        t = guess
    return t


def chi2_1_sf(x: float) -> float:
    """P(X >= x) for X chi-square with one degree of freedom."""
    return chi2_sf(x, 1)


# -- one arm -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Moments:
    """The numeric outcomes of one arm: count, mean and the sum of squared deviations from the
    mean (the store computes it in two passes, so no cancellation of large sums)."""

    n: int
    mean: float
    squares: float

    @property
    def variance(self) -> float:
        return self.squares / (self.n - 1) if self.n >= 2 else math.nan


@dataclass(frozen=True)
class MeanEstimate:
    n: int
    mean: float | None
    sd: float | None
    ci95: tuple[float, float] | None
    reason: str | None = None


def mean_estimate(m: Moments) -> MeanEstimate:
    """The mean with its Student t 95 % interval, mean +- t(0.975, n-1) s / sqrt(n)."""
    if m.n == 0:
        return MeanEstimate(0, None, None, None, "no numeric outcomes yet")
    if m.n < 2:
        return MeanEstimate(1, m.mean, None, None, "an interval needs at least 2 values")
    sd = math.sqrt(max(m.variance, 0.0))
    half = t_quantile(0.5 + CONFIDENCE / 2.0, m.n - 1) * sd / math.sqrt(m.n)
    return MeanEstimate(m.n, m.mean, sd, (m.mean - half, m.mean + half))


def wilson(successes: int, n: int, z: float = Z_975) -> tuple[float, float]:
    """Wilson's score interval for a binomial proportion (Wilson 1927)."""
    if n <= 0 or not 0 <= successes <= n:
        raise ValueError("expected 0 <= successes <= n and n > 0")
    share = successes / n
    z2 = z * z
    denominator = 1.0 + z2 / n
    centre = (share + z2 / (2.0 * n)) / denominator
    half = z / denominator * math.sqrt(share * (1.0 - share) / n + z2 / (4.0 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


@dataclass(frozen=True)
class LabelShare:
    count: int
    share: float | None
    ci95: tuple[float, float] | None


def label_share(count: int, labelled: int) -> LabelShare:
    """The share of one label among an arm's labelled outcomes, with its Wilson interval."""
    if labelled == 0:
        return LabelShare(count, None, None)
    return LabelShare(count, count / labelled, wilson(count, labelled))


# -- an arm against the control ----------------------------------------------------------------


@dataclass(frozen=True)
class MeanComparison:
    """Welch's t-test of arm minus control."""

    difference: float | None
    ci95: tuple[float, float] | None
    statistic: float | None
    dof: float | None
    p_value: float | None
    reason: str | None = None
    test: str = "welch_t"


def welch(control: Moments, arm: Moments) -> MeanComparison:
    """Welch's unequal-variances t-test (Welch 1947) with the Welch-Satterthwaite degrees of
    freedom; the statistic is (mean_arm - mean_control) / se, as
    ``scipy.stats.ttest_ind_from_stats(arm..., control..., equal_var=False)``."""
    if control.n < 2 or arm.n < 2:
        return MeanComparison(None, None, None, None, None, "each arm needs at least 2 values")
    difference = arm.mean - control.mean
    v_control = max(control.variance, 0.0) / control.n
    v_arm = max(arm.variance, 0.0) / arm.n
    se2 = v_control + v_arm
    if se2 <= 0.0 or not math.isfinite(se2):
        return MeanComparison(
            difference, None, None, None, None, "no variance in either arm: the test is undefined"
        )
    se = math.sqrt(se2)
    dof = se2 * se2 / (v_control * v_control / (control.n - 1) + v_arm * v_arm / (arm.n - 1))
    statistic = difference / se
    half = t_quantile(0.5 + CONFIDENCE / 2.0, dof) * se
    return MeanComparison(
        difference,
        (difference - half, difference + half),
        statistic,
        dof,
        t_two_sided(statistic, dof),
    )


@dataclass(frozen=True)
class ShareComparison:
    """Pearson's chi-square on the 2x2 table (label or not) x (arm or control), no continuity
    correction; the difference is arm minus control with Newcombe's hybrid score interval."""

    difference: float | None
    ci95: tuple[float, float] | None
    statistic: float | None
    p_value: float | None
    reason: str | None = None
    test: str = "pearson_chi2_2x2"


def two_shares(control_hits: int, control_n: int, arm_hits: int, arm_n: int) -> ShareComparison:
    if control_n == 0 or arm_n == 0:
        return ShareComparison(None, None, None, None, "each arm needs labelled outcomes")
    p_control, p_arm = control_hits / control_n, arm_hits / arm_n
    difference = p_arm - p_control
    low_a, high_a = wilson(arm_hits, arm_n)
    low_c, high_c = wilson(control_hits, control_n)
    ci = (
        difference - math.hypot(p_arm - low_a, high_c - p_control),
        difference + math.hypot(high_a - p_arm, p_control - low_c),
    )
    hits, total = control_hits + arm_hits, control_n + arm_n
    if hits == 0 or hits == total:
        return ShareComparison(
            difference, ci, None, None, "every labelled outcome is the same: the test is undefined"
        )
    # Pearson's statistic of a 2x2 table: N (ad - bc)^2 / (row and column totals), exact in
    # integers up to the final division.
    a, b = arm_hits, arm_n - arm_hits
    c, d = control_hits, control_n - control_hits
    statistic = total * (a * d - b * c) ** 2 / (hits * (total - hits) * arm_n * control_n)
    return ShareComparison(difference, ci, statistic, chi2_1_sf(statistic))
