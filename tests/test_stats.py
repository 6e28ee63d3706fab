"""Comparison statistics against scipy, normal theory and hand-checkable cases."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy import stats

from qlab.compare import stats as stats_module
from qlab.compare.stats import (
    ESTIMATE,
    LOWER_BOUND,
    UNDETERMINED,
    UPPER_BOUND,
    bootstrap_ci,
    few_seeds_warning,
    iqm,
    loss_from_best,
    median_ci,
    median_is_censored,
    median_ratio,
    performance_profile,
    performance_profile_ci,
    probability_of_improvement,
    probability_of_improvement_ci,
    steps_to_threshold,
)

FINITE = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)
TIED = st.integers(0, 5).map(float)  # few distinct values, so ties are common


def mc_tolerance(distribution: np.ndarray, confidence: float, n_resamples: int, k: float = 5.0) -> np.ndarray:
    """k standard errors of the difference of two independent Monte Carlo percentile estimates.

    A sample p-quantile from B draws has standard error sqrt(p (1 - p) / B) / f(q_p) (asymptotic
    normality of sample quantiles, Serfling 1980, section 2.3; from memory). f is approximated by a
    normal density with the bootstrap distribution's standard deviation; two independent estimates
    (ours and scipy's, different random streams) differ with standard error sqrt(2) times that.
    """
    p = (1.0 - confidence) / 2.0
    spread = np.std(distribution, axis=0) / stats.norm.pdf(stats.norm.ppf(p))  # 1 / f(q_p)
    return k * np.sqrt(2.0) * np.sqrt(p * (1.0 - p) / n_resamples) * spread


# --- interquartile mean -------------------------------------------------------------------------


@given(data=st.data(), x=hnp.arrays(np.float64, hnp.array_shapes(min_dims=1, max_dims=3, max_side=9), elements=FINITE))
def test_iqm_matches_scipy_trim_mean(data, x):
    axis = data.draw(st.integers(-x.ndim, x.ndim - 1))
    expected = stats.trim_mean(x, 0.25, axis=axis)  # scipy.stats.trim_mean
    np.testing.assert_allclose(iqm(x, axis=axis), expected, rtol=1e-12, atol=1e-9)


def test_iqm_drops_a_quarter_at_each_end():
    x = np.random.default_rng(0).normal(size=(8, 12))
    # scipy.stats.trim_mean on the transposed array, reduced along axis 0
    np.testing.assert_allclose(iqm(x, axis=1), stats.trim_mean(x.T, 0.25, axis=0), rtol=1e-12)


def test_iqm_rejects_empty_and_bad_axis():
    with pytest.raises(ValueError, match="x must be non-empty"):
        iqm(np.empty((3, 0)))
    with pytest.raises(ValueError, match="axis"):
        iqm(np.ones(4), axis=1)


# --- bootstrap intervals ------------------------------------------------------------------------


@pytest.mark.parametrize("statistic", [np.mean, iqm], ids=["mean", "iqm"])
@pytest.mark.parametrize("confidence", [0.8, 0.95])
def test_bootstrap_ci_matches_scipy_percentile_bootstrap(statistic, confidence):
    samples = np.random.default_rng(1).gamma(2.0, size=(30, 3))  # skewed, like success rates near 0
    n_resamples = 20_000
    res = stats.bootstrap(  # scipy.stats.bootstrap, percentile method
        (samples,), statistic, n_resamples=n_resamples, method="percentile",
        confidence_level=confidence, axis=0, vectorized=True, rng=np.random.default_rng(2),
    )
    low, high = bootstrap_ci(samples, statistic, confidence, n_resamples, seed=3)
    tol = mc_tolerance(res.bootstrap_distribution.T, confidence, n_resamples)
    assert low.shape == high.shape == (3,)
    assert np.all(np.abs(low - res.confidence_interval.low) <= tol)
    assert np.all(np.abs(high - res.confidence_interval.high) <= tol)


@pytest.mark.parametrize(("statistic", "n_runs"), [(np.mean, 8), (iqm, 12)], ids=["mean", "iqm"])
def test_bootstrap_ci_of_a_learning_curve_matches_scipy_point_by_point(statistic, n_runs):
    # A band as the report draws it, 41 evaluation points at once; each point has its own scale and an offset of
    # its index, so an interval computed on the wrong point (a mixed-up axis) misses by about 1.
    n_points, n_resamples = 41, 20_000
    rng = np.random.default_rng(18)
    samples = rng.gamma(2.0, size=(n_runs, n_points)) * np.linspace(0.1, 3.0, n_points) + np.arange(n_points)
    res = stats.bootstrap(  # scipy.stats.bootstrap, percentile method, one interval per point
        (samples,), statistic, n_resamples=n_resamples, method="percentile", axis=0, vectorized=True,
        rng=np.random.default_rng(19),
    )
    low, high = bootstrap_ci(samples, statistic, 0.95, n_resamples, seed=20)
    tol = mc_tolerance(res.bootstrap_distribution.T, 0.95, n_resamples)
    assert tol.max() < 0.5  # sharp enough to tell neighbouring points apart
    assert low.shape == high.shape == (n_points,)
    assert np.all(np.abs(low - res.confidence_interval.low) <= tol)
    assert np.all(np.abs(high - res.confidence_interval.high) <= tol)


def test_bootstrap_ci_of_one_dimensional_samples_is_scalar_shaped():
    samples = np.random.default_rng(4).normal(size=25)
    res = stats.bootstrap(  # scipy.stats.bootstrap, percentile method
        (samples,), np.mean, n_resamples=20_000, method="percentile", rng=np.random.default_rng(5)
    )
    low, high = bootstrap_ci(samples, n_resamples=20_000)
    tol = mc_tolerance(res.bootstrap_distribution, 0.95, 20_000)
    assert low.shape == high.shape == ()
    assert abs(low - res.confidence_interval.low) <= tol
    assert abs(high - res.confidence_interval.high) <= tol


def test_bootstrap_ci_of_mean_approaches_normal_theory_for_large_n():
    n, n_resamples = 500, 10_000
    x = np.random.default_rng(6).normal(3.0, 2.0, size=n)
    se = x.std(ddof=1) / np.sqrt(n)
    low, high = bootstrap_ci(x, np.mean, 0.95, n_resamples, seed=7)
    # Central limit theorem: mean +- 1.96 s / sqrt(n). Tolerance: 5 Monte Carlo standard errors of a
    # 2.5% percentile from B draws, sqrt(p (1 - p) / B) / phi(1.96) * se (see mc_tolerance); the
    # bootstrap's own O(1/n) and skewness corrections are far smaller for normal data.
    tol = 5.0 * np.sqrt(0.025 * 0.975 / n_resamples) / stats.norm.pdf(1.96) * se
    assert abs(low - (x.mean() - 1.96 * se)) <= tol
    assert abs(high - (x.mean() + 1.96 * se)) <= tol


def test_bootstrap_ci_is_reproducible_for_a_seed():
    x = np.random.default_rng(8).normal(size=(12, 4))
    first, second = bootstrap_ci(x, iqm, seed=11), bootstrap_ci(x, iqm, seed=11)
    np.testing.assert_array_equal(first[0], second[0])
    np.testing.assert_array_equal(first[1], second[1])


def test_bootstrap_ci_does_not_depend_on_the_chunk_size(monkeypatch):
    x = np.random.default_rng(16).normal(size=(9, 5))
    whole = bootstrap_ci(x, iqm, n_resamples=300, seed=17)
    monkeypatch.setattr(stats_module, "_MAX_RESAMPLED_ELEMENTS", 100)  # 2 resamples per chunk
    chunked = bootstrap_ci(x, iqm, n_resamples=300, seed=17)
    np.testing.assert_array_equal(whole[0], chunked[0])
    np.testing.assert_array_equal(whole[1], chunked[1])


def test_bootstrap_ci_rejects_a_statistic_that_keeps_the_run_axis():
    with pytest.raises(ValueError, match="statistic"):
        bootstrap_ci(np.ones((5, 2)), lambda a, axis: a)


# --- probability of improvement -----------------------------------------------------------------


@given(x=st.lists(TIED, min_size=1, max_size=12), y=st.lists(TIED, min_size=1, max_size=12))
def test_probability_of_improvement_matches_mann_whitney_u_with_ties(x, y):
    x, y = np.array(x), np.array(y)
    # scipy.stats.mannwhitneyu: U of the first sample counts pairs x > y plus half the ties
    u = stats.mannwhitneyu(x, y, method="asymptotic").statistic
    assert probability_of_improvement(x, y) == pytest.approx(u / (x.size * y.size), abs=1e-12)
    # Agarwal et al. (2021), definition of P(X > Y) as an average over all run pairs
    pairs = (x[:, None] > y[None, :]).mean() + 0.5 * (x[:, None] == y[None, :]).mean()
    assert probability_of_improvement(x, y) == pytest.approx(pairs, abs=1e-12)


@given(x=st.lists(FINITE, min_size=1, max_size=15))
def test_probability_of_improvement_of_a_variant_over_itself_is_one_half(x):
    # P(X > X') + 0.5 P(X = X') = 0.5 by symmetry of the pair count (Agarwal et al. 2021)
    assert probability_of_improvement(np.array(x), np.array(x)) == pytest.approx(0.5, abs=1e-12)


def test_probability_of_improvement_ci_matches_scipy_two_sample_bootstrap():
    rng = np.random.default_rng(9)
    x, y = rng.normal(0.6, 1.0, size=15), rng.normal(0.0, 1.0, size=12)
    n_resamples = 20_000

    def u_fraction(a, b, axis):
        # scipy.stats.mannwhitneyu U / (n m), batched along the resample axis
        return stats.mannwhitneyu(a, b, axis=axis, method="asymptotic").statistic / (a.shape[axis] * b.shape[axis])

    res = stats.bootstrap(  # scipy.stats.bootstrap, unpaired samples resampled independently
        (x, y), u_fraction, n_resamples=n_resamples, method="percentile", paired=False,
        vectorized=True, rng=np.random.default_rng(10),
    )
    low, high = probability_of_improvement_ci(x, y, n_resamples=n_resamples, seed=12)
    # Monte Carlo tolerance plus one lattice step 1 / (2 n m): the statistic only takes those values.
    tol = mc_tolerance(res.bootstrap_distribution, 0.95, n_resamples) + 1.0 / (2 * x.size * y.size)
    assert abs(low - res.confidence_interval.low) <= tol
    assert abs(high - res.confidence_interval.high) <= tol


def test_probability_of_improvement_rejects_nan_and_empty():
    with pytest.raises(ValueError, match="x must be finite"):
        probability_of_improvement(np.array([1.0, np.nan]), np.ones(3))
    with pytest.raises(ValueError, match="y must hold at least one run"):
        probability_of_improvement(np.ones(3), np.array([]))


# --- steps to threshold -------------------------------------------------------------------------


def test_steps_to_threshold_hand_cases():
    steps = np.array([0, 100, 200, 300])
    curves = np.array([
        [0.0, 0.5, 0.9, 1.0],  # reaches 0.9 exactly at step 200
        [0.0, 0.95, 0.1, 0.0],  # reaches at 100, later drops: the first step counts
        [0.1, 0.2, 0.3, 0.4],  # never: censored, infinitely many steps
        [0.2, np.nan, np.nan, np.nan],  # crashed after the first evaluation: not reached
        [0.0, np.nan, 0.9, np.nan],  # a missing evaluation in between, reached at 200
        [0.9, 1.0, 1.0, 1.0],  # reached at the first evaluation
    ])
    first = steps_to_threshold(steps, curves, threshold=0.9, budget=400)
    np.testing.assert_array_equal(first, [200, 100, np.inf, np.inf, 200, 0])


def test_steps_to_threshold_ignores_evaluations_after_the_budget():
    steps = np.array([0, 100, 200, 300])
    curves = np.array([[0.0, 0.0, 0.0, 1.0], [0.0, 1.0, 1.0, 1.0]])
    np.testing.assert_array_equal(steps_to_threshold(steps, curves, threshold=0.5, budget=250), [np.inf, 100])


@pytest.mark.parametrize(
    ("values", "censored", "median"),
    [
        ([300.0, 100.0, np.inf, 200.0], False, 250.0),  # 1 of 4 never: sorted 100, 200, 300, inf; (200 + 300) / 2
        ([300.0, np.inf, 100.0, np.inf], True, np.inf),  # 2 of 4: the middle pair is 300 and inf, midpoint inf
        ([100.0, np.inf, 200.0, np.inf, 50.0], False, 200.0),  # 2 of 5: the third of 50, 100, 200, inf, inf
        ([np.inf, 10.0, np.inf], True, np.inf),  # 2 of 3
    ],
)
def test_a_median_with_half_or_more_runs_never_reaching_is_censored(values, censored, median):
    assert median_is_censored(np.array(values)) is censored
    assert np.median(values) == median  # numpy agrees: the median is infinite exactly when censored


# --- ratio of medians ---------------------------------------------------------------------------

#: steps to a threshold of two arms, no run censored; sorted, a's 8th of 15 is 7,800 and b's middle pair of 12 is
#: 3,300 and 4,100, so median(a) / median(b) = 7800 / 3700
STEPS_A = np.array([9600, 17000, 3300, 18600, 7800, 5400, 5400, 4700, 7200, 12100, 10700, 11000, 3400, 3600, 17400.0])
STEPS_B = np.array([4900, 8900, 5500, 1800, 5700, 4100, 3300, 2000, 3000, 2800, 4700, 3200.0])


def atom_span(distribution: np.ndarray, value: float) -> float:
    """Distance between the distinct values of ``distribution`` on either side of ``value`` (the atom it sits on)."""
    atoms = np.unique(distribution)
    i = np.clip(np.searchsorted(atoms, value), 1, atoms.size - 2)
    return float(atoms[i + 1] - atoms[i - 1])


def test_median_ratio_matches_scipy_two_sample_bootstrap():
    n_resamples = 20_000
    res = stats.bootstrap(  # scipy.stats.bootstrap, percentile method, the two samples resampled independently
        (STEPS_A, STEPS_B), lambda x, y, axis: np.median(x, axis=axis) / np.median(y, axis=axis),
        n_resamples=n_resamples, method="percentile", paired=False, vectorized=True, rng=np.random.default_rng(22),
    )
    ratio = median_ratio(STEPS_A, STEPS_B, limit=20_000, n_resamples=n_resamples, seed=23)
    assert ratio.kind == ESTIMATE
    assert ratio.value == pytest.approx(7800 / 3700, rel=1e-12)
    # A resampled median is an order statistic (or a midpoint of two), so the ratio lives on a lattice: two Monte
    # Carlo percentiles may sit an atom apart either way, and ours rounds outwards to an atom. Tolerance: Monte Carlo
    # error (mc_tolerance) plus the span of the two gaps around scipy's end.
    dist = res.bootstrap_distribution
    for ours, theirs in ((ratio.low, res.confidence_interval.low), (ratio.high, res.confidence_interval.high)):
        assert abs(ours - theirs) <= mc_tolerance(dist, 0.95, n_resamples) + atom_span(dist, theirs)
    assert ratio.low < ratio.value < ratio.high


def test_median_ci_matches_scipy_bootstrap_and_follows_the_censoring_rule():
    n_resamples = 20_000
    res = stats.bootstrap(  # scipy.stats.bootstrap, percentile method
        (STEPS_A,), np.median, n_resamples=n_resamples, method="percentile", vectorized=True,
        rng=np.random.default_rng(24),
    )
    low, high = median_ci(STEPS_A, 0.95, n_resamples, seed=25)
    dist = res.bootstrap_distribution
    # a resampled median is one of the 15 values: Monte Carlo error plus the atoms either side (see above)
    for ours, theirs in ((low, res.confidence_interval.low), (high, res.confidence_interval.high)):
        assert abs(ours - theirs) <= mc_tolerance(dist, 0.95, n_resamples) + atom_span(dist, theirs)
    assert median_ci(np.array([100.0, np.inf, 300.0, np.inf])) is None  # 2 of 4 never: censored, no interval
    # 2 of 5 never: a resample is censored with P(Binomial(5, 0.4) >= 3) = 0.317 > 0.025, so no upper end
    low, high = median_ci(np.array([100.0, 200.0, 300.0, np.inf, np.inf]))
    # the lowest median, 100, takes 3 or more draws of it: P(Binomial(5, 0.2) >= 3) = 10 * 0.2^3 * 0.8^2
    # + 5 * 0.2^4 * 0.8 + 0.2^5 = 0.058 > 0.025, so the lower end is 100
    assert low == 100.0 and high == np.inf


@pytest.mark.parametrize(
    ("a", "b", "kind", "value"),
    [
        # a: 2 of 4 never reach, median censored, so median(a) > 4,000 = limit; median(b) = 1,000: ratio > 4
        ([1000.0, 2000.0, np.inf, np.inf], [500.0, 1000.0, 1500.0], LOWER_BOUND, 4.0),
        # b censored (2 of 3): median(b) > 4,000 while median(a) = 1,000: ratio < 1000 / 4000 = 0.25
        ([500.0, 1000.0, 1500.0], [np.inf, 3000.0, np.inf], UPPER_BOUND, 0.25),
        ([np.inf, np.inf], [np.inf, 1.0, np.inf], UNDETERMINED, np.nan),  # nothing known about either median
    ],
)
def test_median_ratio_of_a_censored_median_is_a_bound_without_interval(a, b, kind, value):
    ratio = median_ratio(np.array(a), np.array(b), limit=4000.0)
    assert ratio.kind == kind
    np.testing.assert_equal(ratio.value, value)
    assert ratio.low is None and ratio.high is None


def test_median_ratio_interval_widens_where_resampled_medians_are_censored():
    a = np.array([1000.0, 2000.0, 3000.0, np.inf, np.inf])  # 2 of 5 never: median 3,000, not censored
    b = np.array([1000.0, 1000.0, 2000.0, 2000.0, 3000.0])  # median 2,000
    ratio = median_ratio(a, b, limit=4000.0, n_resamples=4000, seed=1)
    assert (ratio.kind, ratio.value) == (ESTIMATE, 1.5)
    # A resample of a is censored when it draws 3 or more of its 2 infinite values in 5 draws:
    # P(Binomial(5, 0.4) >= 3) = 10 * 0.4^3 * 0.6^2 + 5 * 0.4^4 * 0.6 + 0.4^5 = 0.317 > 0.025, so the upper end is inf;
    # b is never censored, so no resampled ratio is 0 and the lower end is a finite ratio.
    assert ratio.high == np.inf
    assert 0.0 < ratio.low < ratio.value
    # Both censored: a resampled b is censored with the same 0.317, its ratio 0 (a finite) or unknown (a censored,
    # counted 0 for the lower end): 0.317 > 0.025 of the resamples sit at 0, so the lower end is 0.
    both = median_ratio(a, a[::-1], limit=4000.0, n_resamples=4000, seed=1)
    assert (both.value, both.low, both.high) == (1.0, 0.0, np.inf)


def test_median_ratio_is_reproducible_and_checks_its_input():
    first, second = (median_ratio(STEPS_A, STEPS_B, limit=20_000, seed=5) for _ in range(2))
    assert first == second
    with pytest.raises(ValueError, match=r"^a must hold values > 0"):
        median_ratio(np.array([1.0, np.nan]), STEPS_B, limit=1.0)
    with pytest.raises(ValueError, match=r"^b must hold values > 0"):
        median_ratio(STEPS_A, np.array([0.0, 1.0]), limit=1.0)
    with pytest.raises(ValueError, match=r"^limit "):
        median_ratio(STEPS_A, STEPS_B, limit=np.inf)


def test_steps_to_threshold_validates_shapes():
    with pytest.raises(ValueError, match="curves must have shape"):
        steps_to_threshold(np.arange(3), np.zeros((2, 4)), 0.5, 10)
    with pytest.raises(ValueError, match="steps must be strictly increasing"):
        steps_to_threshold(np.array([0, 2, 2]), np.zeros((2, 3)), 0.5, 10)
    with pytest.raises(ValueError, match="curves must hold at least one run"):
        steps_to_threshold(np.arange(3), np.zeros((0, 3)), 0.5, 10)


# --- loss from the best score ------------------------------------------------------------------


def test_loss_from_best_counts_up_from_zero_for_success_rates():
    curves = np.array([
        [0.0, 1.0, 0.6],  # best 1.0, final 0.4 below: (1.0 - 0.4) / (1.0 - 0) = 0.6
        [0.0, 0.8, 0.8],  # best 0.8, final 0.4: (0.8 - 0.4) / 0.8 = 0.5
        [0.0, 0.0, 0.0],  # never above the floor: 0
        [np.nan, 0.5, 0.5],  # not yet evaluated at the first step: NaN skipped; final is the best, 0
    ])
    final = np.array([0.4, 0.4, 0.0, 1.0])
    np.testing.assert_allclose(loss_from_best(curves, final, floor=0.0), [0.6, 0.5, 0.0, 0.0], rtol=1e-12)


def test_loss_from_best_uses_each_runs_own_range_without_a_floor():
    curves = np.array([[-5.0, -1.0], [-5.0, -2.0], [-2.0, -2.0]])
    final = np.array([-4.0, -3.0, -2.0])
    # (best - final) / (best - worst): (-1 + 4) / (-1 + 5) = 0.75; (-2 + 3) / (-2 + 5) = 1/3; flat run: 0
    np.testing.assert_allclose(loss_from_best(curves, final), [0.75, 1.0 / 3.0, 0.0], rtol=1e-12)
    # a final below every evaluation is the worst itself: the whole range lost, (2 - -1) / (2 - -1) = 1
    assert loss_from_best(np.array([[0.0, 2.0]]), np.array([-1.0]))[0] == 1.0


def test_loss_from_best_checks_the_final_shape():
    with pytest.raises(ValueError, match=r"final must have shape \(2,\)"):
        loss_from_best(np.zeros((2, 3)), np.zeros(3))


# --- performance profiles -----------------------------------------------------------------------


@given(scores=st.lists(TIED, min_size=1, max_size=20), taus=st.lists(st.floats(-1.0, 6.0), min_size=1, max_size=10))
def test_performance_profile_is_the_empirical_survival_function(scores, taus):
    x, t = np.array(scores), np.sort(np.array(taus + scores))  # taus include the scores: ties at tau
    profile = performance_profile(x, t)
    # scipy.stats.ecdf(...).sf: fraction of observations strictly greater than tau
    np.testing.assert_allclose(profile, stats.ecdf(x).sf.evaluate(t), atol=1e-12)
    assert np.all(np.diff(profile) <= 0.0)  # non-increasing in tau (a survival function)


def test_performance_profile_ci_matches_scipy_bootstrap():
    scores = np.random.default_rng(13).beta(2.0, 3.0, size=20)
    taus = np.linspace(0.0, 1.0, 9)
    n_resamples = 20_000

    def profile(a, axis):
        # scipy wants the statistic's own components first and the resamples last: shape (taus, resamples)
        return np.moveaxis((np.moveaxis(a, axis, -1)[..., None] > taus).mean(axis=-2), -1, 0)

    res = stats.bootstrap(  # scipy.stats.bootstrap, percentile method, vector-valued statistic
        (scores,), profile, n_resamples=n_resamples, method="percentile", vectorized=True,
        rng=np.random.default_rng(14),
    )
    low, high = performance_profile_ci(scores, taus, n_resamples=n_resamples, seed=15)
    # A fraction of 20 runs lives on multiples of 1/20: two Monte Carlo percentiles may sit one atom apart.
    tol = 1.0 / scores.size + mc_tolerance(res.bootstrap_distribution.T, 0.95, n_resamples)
    assert low.shape == high.shape == taus.shape
    assert np.all(np.abs(low - res.confidence_interval.low) <= tol)
    assert np.all(np.abs(high - res.confidence_interval.high) <= tol)
    point = performance_profile(scores, taus)
    assert np.all((low <= point) & (point <= high))


# --- warnings and validation --------------------------------------------------------------------


def test_few_seeds_warning():
    # minimum of 10 runs: common practice, no source (Agarwal et al. 2021 on under-coverage, from memory)
    message = few_seeds_warning(3)
    assert message is not None and "3" in message and "narrow" in message
    assert few_seeds_warning(10) is None
    assert few_seeds_warning(4, minimum=5) is not None


@pytest.mark.parametrize(
    ("call", "name"),
    [
        (lambda: bootstrap_ci(np.array([])), "samples"),
        (lambda: bootstrap_ci(np.ones((2, 2, 2))), "samples"),
        (lambda: bootstrap_ci(np.ones(5), confidence=0.0), "confidence"),
        (lambda: bootstrap_ci(np.ones(5), confidence=1.0), "confidence"),
        (lambda: bootstrap_ci(np.ones(5), n_resamples=0), "n_resamples"),
        (lambda: probability_of_improvement_ci(np.ones(3), np.ones(3), confidence=1.5), "confidence"),
        (lambda: probability_of_improvement_ci(np.ones(3), np.ones(3), n_resamples=0), "n_resamples"),
        (lambda: performance_profile(np.array([]), np.zeros(2)), "scores"),
        (lambda: performance_profile_ci(np.ones(3), np.zeros(2), confidence=-0.1), "confidence"),
        (lambda: performance_profile_ci(np.ones(3), np.zeros(2), n_resamples=0.5), "n_resamples"),
        (lambda: few_seeds_warning(-1), "n"),
        (lambda: few_seeds_warning(3, minimum=0), "minimum"),
    ],
)
def test_bad_arguments_raise_value_error_naming_them(call, name):
    with pytest.raises(ValueError, match=rf"^{name} "):
        call()
