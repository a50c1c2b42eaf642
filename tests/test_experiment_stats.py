"""The experiment report's statistics against SciPy, hand-computed examples and simulation:
the Student t tail and quantile, Welch's t-test, Pearson's chi-square on a 2x2 table, Wilson's
interval, the power to find a planted difference and the false-positive rate on A/A traffic."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from service.experiment import (
    Z_975,
    Moments,
    beta_inc,
    label_share,
    mean_estimate,
    t_density,
    t_quantile,
    t_two_sided,
    two_shares,
    welch,
    wilson,
)

RTOL = 1e-9


def moments(values: np.ndarray) -> Moments:
    return Moments(
        int(values.size), float(values.mean()), float(((values - values.mean()) ** 2).sum())
    )


# -- special functions -------------------------------------------------------------------------


def test_incomplete_beta_matches_scipy() -> None:
    """Reference: scipy.special.betainc, from a = b = 0.1 to 3e6 and across (0, 1)."""
    rng = np.random.default_rng(11)
    for _ in range(2000):
        a, b = 10 ** rng.uniform(-1, 6.5, size=2)
        x = float(rng.uniform())
        expected = float(special.betainc(a, b, x))
        if expected < 1e-300:
            continue
        assert beta_inc(a, b, x) == pytest.approx(expected, rel=RTOL), (a, b, x)


@pytest.mark.parametrize("dof", [1.0, 1.5, 2.0, 3.7, 10.0, 29.5, 100.0, 1234.5, 1e5, 3e6])
def test_student_t_tail_matches_scipy(dof: float) -> None:
    """Reference: 2 * scipy.stats.t.sf(|t|, dof). Relative error <= 1e-9 down to p = 1e-250
    (the whole range tested: the continued fraction keeps relative precision in the tail).
    For |t| < 1e-4 SciPy's own tail drifts by a few 1e-9 near p = 1; the closed forms below
    check that region."""
    checked = 0
    for t in [1e-3, 0.1, 0.5, 1.0, 1.96, 2.5, 4.0, 7.0, 12.0, 30.0, 100.0, 1e3, 1e5]:
        expected = 2.0 * float(stats.t.sf(t, dof))
        if expected < 1e-250:
            continue
        checked += 1
        assert t_two_sided(t, dof) == pytest.approx(expected, rel=RTOL), t
        assert t_two_sided(-t, dof) == t_two_sided(t, dof)
    assert checked >= 8


def test_student_t_tail_closed_forms() -> None:
    """dof = 1 (Cauchy): P(|T| >= t) = 1 - 2 atan(t) / pi; dof = 2: 1 - t / sqrt(2 + t^2)
    (e.g. Johnson, Kotz & Balakrishnan, Continuous Univariate Distributions 2, ch. 28)."""
    for t in [1e-12, 1e-8, 1e-4, 0.3, 1.0, 3.0, 50.0, 1e4]:
        assert t_two_sided(t, 1.0) == pytest.approx(1 - 2 * math.atan(t) / math.pi, rel=1e-13)
        assert t_two_sided(t, 2.0) == pytest.approx(1 - t / math.sqrt(2 + t * t), rel=1e-9)
    # Far in the tail the closed forms cancel; their asymptotes are 2 / (pi t) and 1 / t^2.
    assert t_two_sided(1e9, 1.0) == pytest.approx(2 / (math.pi * 1e9), rel=1e-9)
    assert t_two_sided(1e9, 2.0) == pytest.approx(1e-18, rel=1e-9)


@pytest.mark.parametrize("dof", [1.0, 1.5, 2.0, 4.2, 9.0, 30.0, 250.0, 1e4, 1e6])
def test_student_t_quantile_matches_scipy(dof: float) -> None:
    """Reference: scipy.stats.t.ppf (and t.pdf for the density Newton's method uses)."""
    for probability in (0.5, 0.6, 0.9, 0.975, 0.995, 0.99999):
        expected = float(stats.t.ppf(probability, dof))
        assert t_quantile(probability, dof) == pytest.approx(expected, rel=RTOL, abs=1e-12)
        assert t_density(expected, dof) == pytest.approx(
            float(stats.t.pdf(expected, dof)), rel=RTOL
        )


def test_normal_quantile_constant() -> None:
    assert pytest.approx(float(stats.norm.ppf(0.975)), rel=1e-15) == Z_975


# -- Welch's t-test ----------------------------------------------------------------------------


def test_welch_hand_computed_example() -> None:
    """Control 1, 2, 3, 4 (mean 2.5, s^2 = 5/3); arm 3, 5, 7, 9, 11 (mean 7, s^2 = 10).
    By hand (Welch 1947; Satterthwaite 1946): se^2 = (5/3)/4 + 10/5 = 29/12;
    t = 4.5 / sqrt(29/12) = 2.894706...; df = (29/12)^2 / ((5/12)^2 / 3 + 2^2 / 4)
    = (841/144) / (25/432 + 1) = 2523/457 = 5.520788..."""
    result = welch(moments(np.array([1.0, 2, 3, 4])), moments(np.array([3.0, 5, 7, 9, 11])))
    assert result.difference == pytest.approx(4.5)
    assert result.statistic == pytest.approx(4.5 / math.sqrt(29 / 12), rel=1e-12)
    assert result.dof == pytest.approx(2523 / 457, rel=1e-12)
    # The p-value of t = 2.8947 on 5.52 dof lies between the table's two-sided 0.05 and 0.02
    # columns for 5 and 6 dof (t = 2.571 / 3.365 and 2.447 / 3.143).
    assert result.p_value is not None and 0.02 < result.p_value < 0.05
    assert result.ci95 is not None and result.ci95[0] > 0  # p < 0.05: the CI excludes 0


def _welch_reference(c: Moments, a: Moments) -> tuple[float, float, float, float]:
    """scipy.stats.ttest_ind_from_stats(equal_var=False), and the Welch-Satterthwaite df and
    CI half-width from scipy.stats.t.ppf (the function reports no df)."""
    sd_c, sd_a = math.sqrt(c.variance), math.sqrt(a.variance)
    ref = stats.ttest_ind_from_stats(a.mean, sd_a, a.n, c.mean, sd_c, c.n, equal_var=False)
    vc, va = c.variance / c.n, a.variance / a.n
    dof = (vc + va) ** 2 / (vc**2 / (c.n - 1) + va**2 / (a.n - 1))
    half = float(stats.t.ppf(0.975, dof)) * math.sqrt(vc + va)
    return float(ref.statistic), float(ref.pvalue), dof, half


def test_welch_matches_scipy_on_many_count_sets() -> None:
    """Reference: scipy.stats.ttest_ind_from_stats(equal_var=False) on 600 random count sets
    from n = 2 to 10^6 per arm, variance ratios up to 10^6 and effects up to p ~ 1e-200.
    Statistic, p-value and interval agree to a relative 1e-9."""
    rng = np.random.default_rng(2024)
    smallest = 1.0
    for _ in range(600):
        n_c, n_a = (int(v) for v in np.round(10 ** rng.uniform(np.log10(2), 6, size=2)))
        sd_c, sd_a = 10 ** rng.uniform(-3, 3, size=2)
        mean_c = float(rng.normal(0, 100))
        effect = float(rng.choice([0.0, 1e-3, 0.1, 1.0, 5.0, 30.0])) * rng.choice([-1, 1])
        se = math.sqrt(sd_c**2 / n_c + sd_a**2 / n_a)
        mean_a = mean_c + effect * se + float(rng.normal(0, se))
        c = Moments(n_c, mean_c, sd_c**2 * (n_c - 1))
        a = Moments(n_a, mean_a, sd_a**2 * (n_a - 1))
        statistic, p_value, dof, half = _welch_reference(c, a)
        ours = welch(c, a)
        assert ours.statistic == pytest.approx(statistic, rel=RTOL)
        assert ours.dof == pytest.approx(dof, rel=RTOL)
        if p_value > 1e-250:
            assert ours.p_value == pytest.approx(p_value, rel=RTOL), (c, a)
            smallest = min(smallest, p_value)
        else:
            assert ours.p_value is not None and ours.p_value < 1e-240
        assert ours.ci95 is not None and ours.difference is not None
        assert ours.ci95[1] - ours.difference == pytest.approx(half, rel=RTOL)
    assert smallest < 1e-12  # the comparison reached the far tail


def test_welch_degenerate_cases_give_reasons() -> None:
    one = Moments(1, 3.0, 0.0)
    some = Moments(10, 3.0, 9.0)
    flat = Moments(10, 3.0, 0.0)
    assert welch(one, some).p_value is None and welch(one, some).reason
    assert welch(some, Moments(0, 0.0, 0.0)).reason
    flat_result = welch(flat, Moments(5, 4.0, 0.0))
    assert flat_result.p_value is None and flat_result.difference == 1.0
    assert "variance" in (flat_result.reason or "")
    half_flat = welch(flat, some)  # one arm without variance is fine: se comes from the other
    assert half_flat.p_value == pytest.approx(1.0)
    assert mean_estimate(Moments(0, 0.0, 0.0)).reason
    single = mean_estimate(one)
    assert single.mean == 3.0 and single.ci95 is None and single.reason


def test_mean_interval_matches_scipy() -> None:
    """Reference: scipy.stats.t.interval(0.95, n - 1, loc=mean, scale=s / sqrt(n))."""
    rng = np.random.default_rng(3)
    for n in (2, 3, 10, 1000):
        values = rng.normal(5, 2, size=n)
        ours = mean_estimate(moments(values))
        low, high = stats.t.interval(0.95, n - 1, loc=values.mean(), scale=stats.sem(values))
        assert ours.ci95 is not None
        assert ours.ci95 == pytest.approx((low, high), rel=RTOL)
        assert ours.sd == pytest.approx(float(values.std(ddof=1)), rel=1e-12)


# -- shares ------------------------------------------------------------------------------------


def test_wilson_hand_computed() -> None:
    """Wilson (1927) with no successes: the interval is [0, z^2 / (n + z^2)]; for n = 10,
    z = 1.959964: 3.841459 / 13.841459 = 0.277533. With k = n / 2 it is centred on 1/2 with
    half-width z / (1 + z^2/n) * sqrt(1/(4n) + z^2/(4n^2)); n = 20: 1 + 3.841459/20 = 1.192073,
    sqrt(0.0125 + 0.002400912) = 0.1220693, 1.959964 / 1.192073 * 0.1220693 = 0.2007020."""
    low, high = wilson(0, 10)
    assert low == 0.0 and high == pytest.approx(3.841459 / 13.841459, rel=1e-6)
    low, high = wilson(10, 20)
    assert (low + high) / 2 == pytest.approx(0.5, rel=1e-12)
    assert (high - low) / 2 == pytest.approx(0.2007020, rel=1e-6)


def test_wilson_matches_scipy() -> None:
    """Reference: scipy.stats.binomtest(k, n).proportion_ci(method="wilson")."""
    for k, n in [(0, 1), (1, 1), (3, 7), (50, 100), (1, 10_000), (999_999, 1_000_000)]:
        ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        assert wilson(k, n) == pytest.approx((ci.low, ci.high), rel=RTOL, abs=1e-15)
    assert label_share(0, 0).share is None


def test_two_shares_match_scipy_chi2_contingency() -> None:
    """Reference: scipy.stats.chi2_contingency(correction=False) on the 2x2 table, from a
    handful of outcomes to 10^7 per arm; statistic and p-value to a relative 1e-9."""
    rng = np.random.default_rng(9)
    tables = [(5, 15, 7, 10), (1, 2, 1, 3), (0, 40, 12, 40), (480, 1000, 520, 1000)]
    for _ in range(400):
        n_c, n_a = (int(v) for v in np.round(10 ** rng.uniform(0.5, 7, size=2)))
        share = float(rng.uniform(0.001, 0.999))
        shift = float(rng.choice([0.0, 0.001, 0.01, 0.1]))
        tables.append(
            (
                int(rng.binomial(n_c, share)),
                n_c,
                int(rng.binomial(n_a, min(1.0, share + shift))),
                n_a,
            )
        )
    smallest = 1.0
    for hits_c, n_c, hits_a, n_a in tables:
        ours = two_shares(hits_c, n_c, hits_a, n_a)
        if hits_c + hits_a in (0, n_c + n_a):
            assert ours.p_value is None and ours.reason
            continue
        table = np.array([[hits_a, n_a - hits_a], [hits_c, n_c - hits_c]])
        statistic, p_value, dof, _ = stats.chi2_contingency(table, correction=False)
        assert dof == 1
        assert ours.statistic == pytest.approx(float(statistic), rel=RTOL)
        assert ours.p_value == pytest.approx(float(p_value), rel=RTOL, abs=1e-300)
        assert ours.difference == pytest.approx(hits_a / n_a - hits_c / n_c, abs=1e-15)
        smallest = min(smallest, float(p_value))
    assert smallest < 1e-12


def test_share_difference_interval_is_newcombes() -> None:
    """Newcombe (1998) method 10, built here from SciPy's Wilson intervals; and its worked
    example (Table II, 56/70 vs 48/80): 0.0524 to 0.3339."""
    ours = two_shares(48, 80, 56, 70)
    assert ours.ci95 == pytest.approx((0.0524, 0.3339), abs=5e-5)
    for hits_c, n_c, hits_a, n_a in [(3, 20, 9, 25), (0, 10, 4, 12), (700, 1000, 650, 1000)]:
        wc = stats.binomtest(hits_c, n_c).proportion_ci(method="wilson")
        wa = stats.binomtest(hits_a, n_a).proportion_ci(method="wilson")
        pc, pa = hits_c / n_c, hits_a / n_a
        low = pa - pc - math.hypot(pa - wa.low, wc.high - pc)
        high = pa - pc + math.hypot(wa.high - pa, pc - wc.low)
        assert two_shares(hits_c, n_c, hits_a, n_a).ci95 == pytest.approx((low, high), rel=1e-9)


# -- behaviour on simulated experiments --------------------------------------------------------


def test_welch_finds_a_planted_difference() -> None:
    """Power. Control N(0, 1), arm N(0.5, 1.5^2), n = 240 per arm. The normal approximation of
    the power of a two-sided level-0.05 test: se = sqrt((1 + 2.25) / 240) = 0.11637, so
    power = Phi(0.5 / 0.11637 - 1.95996) = Phi(2.3367) = 0.990. Over 200 seeded experiments
    the test must reject in at least 90 % (a binomial(200, 0.99) count falls below 180 with
    probability under 1e-15)."""
    rng = np.random.default_rng(7)
    n = 240
    rejected = 0
    for _ in range(200):
        control = moments(rng.normal(0.0, 1.0, size=n))
        arm = moments(rng.normal(0.5, 1.5, size=n))
        p_value = welch(control, arm).p_value
        assert p_value is not None
        rejected += p_value < 0.05
    assert rejected >= 180, rejected


def test_welch_holds_its_false_positive_rate_on_aa_traffic() -> None:
    """A/A with unequal sizes and spreads (the case Welch's test exists for; Student's pooled
    test would reject too often here): control n = 50, sd 2; arm n = 200, sd 1; same mean.
    Over 1000 seeded experiments the rejections at 0.05 must lie inside the central 99.9 %
    of binomial(1000, 0.05): [29, 74] (scipy.stats.binom.ppf(0.0005 / 0.9995, 1000, 0.05))."""
    rng = np.random.default_rng(8)
    rejected = 0
    for _ in range(1000):
        control = moments(rng.normal(3.0, 2.0, size=50))
        arm = moments(rng.normal(3.0, 1.0, size=200))
        p_value = welch(control, arm).p_value
        assert p_value is not None
        rejected += p_value < 0.05
    low, high = stats.binom.ppf([0.0005, 0.9995], 1000, 0.05)
    assert (low, high) == (29, 74)
    assert low <= rejected <= high, rejected


def test_share_test_power_and_aa_rate() -> None:
    """The same two checks for labels. Planted: 30 % vs 40 % accepted, n = 1000 per arm; the
    normal approximation gives power Phi(0.1 / sqrt(0.3 * 0.7 / 1000 + 0.4 * 0.6 / 1000)
    - 1.95996) = Phi(2.7541) = 0.997, so at least 180 of 200 must reject. A/A at 30 %: the
    rejections of 1000 experiments within the binomial bound [29, 74] as above."""
    rng = np.random.default_rng(10)
    rejected = 0
    for _ in range(200):
        result = two_shares(int(rng.binomial(1000, 0.3)), 1000, int(rng.binomial(1000, 0.4)), 1000)
        rejected += result.p_value is not None and result.p_value < 0.05
    assert rejected >= 180, rejected
    false = 0
    for _ in range(1000):
        result = two_shares(int(rng.binomial(400, 0.3)), 400, int(rng.binomial(600, 0.3)), 600)
        false += result.p_value is not None and result.p_value < 0.05
    assert 29 <= false <= 74, false
