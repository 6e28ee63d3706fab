"""Statistics for comparing runs across seeds, after Agarwal et al. (2021), "Deep RL at the edge of
the statistical precipice" (NeurIPS): interquartile mean, percentile bootstrap intervals over runs,
probability of improvement, steps to a success threshold and run-score performance profiles;
and, our own, the share of its best score a run lost by the end and the ratio of two medians
that may be censored (steps to a threshold that some runs never reach).

Every bootstrap draws its resample indices from ``np.random.default_rng(seed)`` in one call per
group of runs, so a result depends only on the data, ``n_resamples`` and ``seed``.

The bootstraps are written here, vectorised over resamples and curve points, rather than as calls
of ``scipy.stats.bootstrap``: the same percentile method (tests/test_stats.py checks them against
it), the random streams the committed demo report was made with, and faster at the report's sizes
(a few runs per arm; ``scripts/bench_stats.py`` prints the ratios). Likewise :func:`iqm` sorts
where ``scipy.stats.trim_mean`` partitions, which is slower on the arrays a bootstrap resamples.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.stats import rankdata

from qlab.validation import require_int, require_positive, require_within

# Largest resampled array (elements) built at once; bigger bootstraps are evaluated in chunks.
_MAX_RESAMPLED_ELEMENTS = 1 << 23


def iqm(x: np.ndarray, axis: int = -1) -> np.ndarray | float:
    """Interquartile mean along ``axis``: the mean after dropping ``floor(n / 4)`` values at each end.

    Same definition as ``scipy.stats.trim_mean(x, 0.25, axis=axis)``.
    """
    a = np.asarray(x, dtype=np.float64)
    if not -a.ndim <= axis < a.ndim:
        raise ValueError(f"axis must lie in [{-a.ndim}, {a.ndim}) for x of shape {a.shape}, got {axis!r}")
    if a.shape[axis] == 0:
        raise ValueError(f"x must be non-empty along axis {axis}, got shape {a.shape}")
    n = a.shape[axis]
    cut = n // 4
    kept = np.moveaxis(np.sort(a, axis=axis), axis, 0)[cut : n - cut]
    return kept.mean(axis=0)


def _check_runs(name: str, values: np.ndarray, ndim: int | tuple[int, ...] = 1) -> np.ndarray:
    a = np.asarray(values, dtype=np.float64)
    allowed = (ndim,) if isinstance(ndim, int) else ndim
    if a.ndim not in allowed:
        raise ValueError(f"{name} must have {' or '.join(map(str, allowed))} dimension(s), got shape {a.shape}")
    if a.shape[0] == 0:
        raise ValueError(f"{name} must hold at least one run, got shape {a.shape}")
    return a


def _check_finite(name: str, values: np.ndarray) -> None:
    if not np.all(np.isfinite(values)):
        raise ValueError(f"{name} must be finite (no NaN or inf); drop or score missing runs first")


def _percentile_interval(distribution: np.ndarray, confidence: float) -> tuple[np.ndarray, np.ndarray]:
    alpha = (1.0 - confidence) / 2.0
    low, high = np.quantile(distribution, [alpha, 1.0 - alpha], axis=0)
    return np.asarray(low), np.asarray(high)


def bootstrap_ci(
    samples: np.ndarray,
    statistic: Callable[..., np.ndarray] = np.mean,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    seed: int = 0,
) -> tuple[np.ndarray, np.ndarray]:
    """Percentile bootstrap interval of ``statistic`` over runs (the first axis of ``samples``).

    ``samples`` has shape ``(n,)`` or ``(n, T)`` (T evaluation points of a learning curve); rows are
    resampled with replacement and ``statistic(resampled, axis=0)`` must reduce the run axis
    (NaN in ``samples`` propagates as the statistic propagates it).
    Returns ``(low, high)``, each of shape ``()`` or ``(T,)``.
    """
    data = _check_runs("samples", samples, (1, 2))
    require_within("confidence", confidence, 0.0, 1.0, open_low=True, open_high=True)
    require_int("n_resamples", n_resamples, 1)
    n = data.shape[0]
    index = np.random.default_rng(seed).integers(0, n, size=(n, int(n_resamples)))
    chunk = max(1, _MAX_RESAMPLED_ELEMENTS // data.size)
    parts = []
    for start in range(0, int(n_resamples), chunk):
        block = index[:, start : start + chunk]
        values = np.asarray(statistic(data[block], axis=0))
        if values.shape != block.shape[1:] + data.shape[1:]:
            raise ValueError(
                f"statistic must reduce axis 0 of an array of shape {block.shape + data.shape[1:]} "
                f"to shape {block.shape[1:] + data.shape[1:]}, got {values.shape}"
            )
        parts.append(values)
    return _percentile_interval(np.concatenate(parts, axis=0), confidence)


def _improvement(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """P(X > Y) + P(X = Y) / 2 along the last axis, by midranks of the pooled sample (batched)."""
    n, m = x.shape[-1], y.shape[-1]
    ranks = rankdata(np.concatenate([x, y], axis=-1), axis=-1)
    u = ranks[..., :n].sum(axis=-1) - n * (n + 1) / 2.0
    return u / (n * m)


def probability_of_improvement(x: np.ndarray, y: np.ndarray) -> float:
    """P(X > Y) + 0.5 P(X = Y) over all pairs of a run of variant X and a run of variant Y."""
    a, b = _check_runs("x", x), _check_runs("y", y)
    _check_finite("x", a)
    _check_finite("y", b)
    return float(_improvement(a, b))


def probability_of_improvement_ci(
    x: np.ndarray, y: np.ndarray, confidence: float = 0.95, n_resamples: int = 2000, seed: int = 0
) -> tuple[float, float]:
    """Percentile bootstrap interval of :func:`probability_of_improvement`, resampling x and y independently."""
    a, b = _check_runs("x", x), _check_runs("y", y)
    _check_finite("x", a)
    _check_finite("y", b)
    require_within("confidence", confidence, 0.0, 1.0, open_low=True, open_high=True)
    require_int("n_resamples", n_resamples, 1)
    rng = np.random.default_rng(seed)
    ia = rng.integers(0, a.size, size=(int(n_resamples), a.size))
    ib = rng.integers(0, b.size, size=(int(n_resamples), b.size))
    low, high = _percentile_interval(_improvement(a[ia], b[ib]), confidence)
    return float(low), float(high)


def steps_to_threshold(steps: np.ndarray, curves: np.ndarray, threshold: float, budget: int) -> np.ndarray:
    """First evaluation step at which each run's curve is ``>= threshold``; ``inf`` for a run that never does.

    ``steps`` (T,) strictly increasing evaluation steps; ``curves`` (n_runs, T) success rates there.
    NaN (a missing evaluation, e.g. after a crash) counts as not reached, as do evaluations after
    ``budget``. A run that never reaches the threshold is censored: it counts as never, infinitely
    many steps, so a median over runs is censored exactly when :func:`median_is_censored` says so.
    """
    s = np.asarray(steps)
    c = _check_runs("curves", curves, 2)
    if s.ndim != 1 or s.size == 0:
        raise ValueError(f"steps must be a non-empty 1-D array, got shape {s.shape}")
    if c.shape[1] != s.size:
        raise ValueError(f"curves must have shape (n_runs, {s.size}) to match steps, got {c.shape}")
    if np.any(np.diff(s) <= 0):
        raise ValueError("steps must be strictly increasing")
    hit = (c >= threshold) & (s <= budget)
    return np.where(hit.any(axis=1), s[hit.argmax(axis=1)].astype(np.float64), np.inf)


def median_is_censored(values: np.ndarray) -> bool:
    """Whether the median of ``values`` (``inf``: never reached) is censored: half or more of them are infinite.

    Then ``np.median`` is infinite too (with an even count the midpoint of a finite and an infinite
    value is infinite), and all a report can say is that the median lies beyond the budget.
    """
    v = _check_runs("values", values)
    return bool(2 * np.count_nonzero(np.isinf(v)) >= v.size)


def loss_from_best(curves: np.ndarray, final: np.ndarray, floor: float | None = None) -> np.ndarray:
    """Per run, the share of its rise from ``floor`` to its best score that it had lost by the end.

    ``curves`` (n_runs, T) holds the scores evaluated during training (NaN: no evaluation), ``final``
    (n_runs,) the final evaluation; best and worst are taken over both. ``floor`` is where a run's
    rise starts: a number (0 for success rates, so a loss above 0.5 means final < 0.5 * best), or
    None for each run's own worst score (for returns, which may be negative). Returns
    ``(best - final) / (best - floor)``, 0 where ``best <= floor`` (nothing to lose).
    """
    c = _check_runs("curves", curves, 2)
    f = np.asarray(final, dtype=np.float64)
    if f.shape != (c.shape[0],):
        raise ValueError(f"final must have shape ({c.shape[0]},) to match curves, got {f.shape}")
    scores = np.concatenate([c, f[:, None]], axis=1)
    best = np.fmax.reduce(scores, axis=1)  # fmax and fmin skip NaN
    start = np.fmin.reduce(scores, axis=1) if floor is None else np.full(best.shape, float(floor))
    rise = best - start
    return np.where(rise > 0, (best - f) / np.where(rise > 0, rise, 1.0), 0.0)


def _outer_quantiles(low_side: np.ndarray, high_side: np.ndarray, confidence: float) -> tuple[float, float]:
    """The percentile interval's ends rounded outwards to resampled values (numpy's ``lower`` and ``higher``
    quantiles), so infinite resampled values need no interpolation."""
    alpha = (1.0 - confidence) / 2.0
    return (float(np.quantile(low_side, alpha, method="lower")),
            float(np.quantile(high_side, 1.0 - alpha, method="higher")))


def _resampled_medians(values: np.ndarray, n_resamples: int, rng: np.random.Generator) -> np.ndarray:
    """Medians of ``n_resamples`` resamples of ``values`` with replacement, drawn in one call."""
    return np.median(values[rng.integers(0, values.size, size=(n_resamples, values.size))], axis=1)


def median_ci(
    values: np.ndarray, confidence: float = 0.95, n_resamples: int = 2000, seed: int = 0,
) -> tuple[float, float] | None:
    """Percentile bootstrap interval of the median of ``values`` (``inf``: a censored run); None when censored.

    A censored median (:func:`median_is_censored`) is only a bound and gets no interval. Otherwise
    a resampled median may still be censored, so the upper end can be ``inf``; the ends are rounded
    outwards to resampled medians (see :func:`median_ratio`).
    """
    v = _check_runs("values", values)
    if np.any(np.isnan(v)):
        raise ValueError("values must not hold NaN (inf for a censored run)")
    require_within("confidence", confidence, 0.0, 1.0, open_low=True, open_high=True)
    require_int("n_resamples", n_resamples, 1)
    if median_is_censored(v):
        return None
    medians = _resampled_medians(v, int(n_resamples), np.random.default_rng(seed))
    return _outer_quantiles(medians, medians, confidence)


#: kinds of :class:`MedianRatio`
ESTIMATE, LOWER_BOUND, UPPER_BOUND, UNDETERMINED = "estimate", "lower bound", "upper bound", "undetermined"


@dataclass(frozen=True)
class MedianRatio:
    """median(a) / median(b): an estimate with its interval, or, where a median is censored, a bound without one."""

    value: float  # the ratio; for a bound the bound itself; NaN when undetermined
    low: float | None  # percentile bootstrap interval of an estimate; None for a bound
    high: float | None
    kind: str  # ESTIMATE, LOWER_BOUND (the ratio exceeds value), UPPER_BOUND (it is below value) or UNDETERMINED


def _censorable(name: str, values: np.ndarray) -> np.ndarray:
    """A 1-D sample of positive values, ``inf`` allowed (a censored run), no NaN."""
    v = _check_runs(name, values)
    if not np.all(v > 0):  # NaN fails too
        raise ValueError(f"{name} must hold values > 0 (inf for a censored run, no NaN)")
    return v


def _ratio_bound(median_a: float, median_b: float, limit: float) -> MedianRatio:
    """What a censored median leaves of the ratio: a censored value is known only to exceed ``limit``."""
    if np.isinf(median_a) and np.isinf(median_b):
        return MedianRatio(float("nan"), None, None, UNDETERMINED)
    if np.isinf(median_a):
        return MedianRatio(limit / median_b, None, None, LOWER_BOUND)
    return MedianRatio(median_a / limit, None, None, UPPER_BOUND)


def median_ratio(
    a: np.ndarray, b: np.ndarray, limit: float, confidence: float = 0.95, n_resamples: int = 2000, seed: int = 0,
) -> MedianRatio:
    """median(a) / median(b) with a percentile bootstrap interval, the two groups resampled independently.

    ``a`` and ``b`` hold positive values, ``inf`` for a censored run (e.g. steps to a threshold never
    reached); ``limit`` is what every censored value is known to exceed (the budget). A censored
    median (half or more of its group infinite, :func:`median_is_censored`) gives a bound and no
    interval: ratio > ``limit / median(b)`` when median(a) is censored, ratio < ``median(a) / limit``
    when median(b) is, undetermined when both are.

    Otherwise ``n_resamples`` resamples of each group are drawn from ``np.random.default_rng(seed)``
    (a's indices, then b's). A resampled median may be censored, making the resampled ratio 0 or
    inf; where both are, the ratio is unknown and counts as 0 for the lower end and inf for the
    upper end, which can only widen the interval. The ends are the resampled ratios at the percentile
    points rounded outwards (numpy's ``lower`` and ``higher`` quantiles), so infinities need no
    interpolation; an end may thus be 0 or inf.
    """
    x, y = _censorable("a", a), _censorable("b", b)
    bound = require_positive("limit", limit)
    require_within("confidence", confidence, 0.0, 1.0, open_low=True, open_high=True)
    require_int("n_resamples", n_resamples, 1)
    median_a, median_b = float(np.median(x)), float(np.median(y))
    if np.isinf(median_a) or np.isinf(median_b):
        return _ratio_bound(median_a, median_b, bound)
    rng = np.random.default_rng(seed)
    resampled_a = _resampled_medians(x, int(n_resamples), rng)
    resampled_b = _resampled_medians(y, int(n_resamples), rng)
    with np.errstate(invalid="ignore"):  # inf / inf: both resampled medians censored
        ratios = resampled_a / resampled_b
    unknown = np.isnan(ratios)
    low, high = _outer_quantiles(np.where(unknown, 0.0, ratios), np.where(unknown, np.inf, ratios), confidence)
    return MedianRatio(median_a / median_b, low, high, ESTIMATE)


def performance_profile(scores: np.ndarray, taus: np.ndarray) -> np.ndarray:
    """Fraction of runs whose score exceeds each tau (run-score distribution, Agarwal et al. 2021)."""
    s = _check_runs("scores", scores)
    _check_finite("scores", s)
    t = np.asarray(taus, dtype=np.float64)
    return 1.0 - np.searchsorted(np.sort(s), t, side="right") / s.size


def performance_profile_ci(
    scores: np.ndarray, taus: np.ndarray, confidence: float = 0.95, n_resamples: int = 2000, seed: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    """Percentile bootstrap band of :func:`performance_profile` over runs; arrays shaped like ``taus``."""
    s = _check_runs("scores", scores)
    _check_finite("scores", s)
    t = np.asarray(taus, dtype=np.float64)
    above = (s[:, None] > t.ravel()[None, :]).astype(np.float64)
    low, high = bootstrap_ci(above, np.mean, confidence, n_resamples, seed)
    return low.reshape(t.shape), high.reshape(t.shape)


def few_seeds_warning(n: int, minimum: int = 10) -> str | None:
    """A one-sentence warning when fewer than ``minimum`` runs back an interval, else None.

    Agarwal et al. (2021) caution that percentile bootstrap intervals from few runs under-cover
    (from memory); the default ``minimum = 10`` is a rule of thumb (common practice, no source).
    """
    require_int("n", n, 0)
    require_int("minimum", minimum, 1)
    if n >= minimum:
        return None
    return (
        f"Only {n} run(s) per variant (fewer than {minimum}): percentile bootstrap intervals from so few "
        "seeds tend to be too narrow, so read them as optimistic (Agarwal et al. 2021)."
    )
