"""Benchmark: qlab's vectorised percentile bootstraps and IQM against scipy.stats, side by side in one process.

Each row times one interval the report computes, at the report's sizes (5 runs per arm, 41
evaluation points, 101 profile thresholds, 2,000 resamples) and at a larger size, with qlab's
function (:mod:`qlab.compare.stats`) and with ``scipy.stats.bootstrap`` (percentile method,
vectorised statistic) on the same data; the last rows time the IQM statistic alone on the
resampled arrays a bootstrap builds, ``stats.iqm`` (a sort) against ``scipy.stats.trim_mean(x, 0.25)``
(a partition). Best of ``--repeats`` timings; the ratio is scipy's time over qlab's. Timings only:
tests/test_stats.py checks the answers against scipy.

    python scripts/bench_stats.py --repeats 30
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from scipy import stats as sps

from qlab.compare import stats

N_RESAMPLES = 2_000  # the report's default


def best_time(fn: Callable[[], object], repeats: int) -> float:
    """Shortest wall time of ``repeats`` calls, in milliseconds (one warm-up call first)."""
    fn()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return 1e3 * min(times)


def scipy_interval(data: tuple[np.ndarray, ...], statistic: Callable, **options) -> Callable[[], object]:
    """A call of ``scipy.stats.bootstrap`` as the report would make it: percentile, vectorised, 2,000 resamples."""
    return lambda: sps.bootstrap(data, statistic, n_resamples=N_RESAMPLES, method="percentile", vectorized=True,
                                 rng=np.random.default_rng(1), **options).confidence_interval


def trimmed(a: np.ndarray, axis: int) -> np.ndarray:
    """The IQM as scipy computes it."""
    return sps.trim_mean(a, 0.25, axis=axis)


def mann_whitney_fraction(a: np.ndarray, b: np.ndarray, axis: int) -> np.ndarray:
    """P(X > Y) + P(X = Y) / 2 from scipy's Mann-Whitney U, batched along the resamples."""
    return sps.mannwhitneyu(a, b, axis=axis, method="asymptotic").statistic / (a.shape[axis] * b.shape[axis])


def workloads(rng: np.random.Generator) -> list[tuple[str, Callable[[], object], Callable[[], object]]]:
    """(label, qlab call, scipy call) for each interval the report computes, at its size and larger."""
    rows = []
    for runs, points in ((5, 41), (20, 200)):
        curve = rng.random((runs, points))
        rows.append((f"curve band, mean: {runs} runs x {points} points", lambda c=curve: stats.bootstrap_ci(c),
                     scipy_interval((curve,), np.mean, axis=0)))
    for runs in (5, 20):
        finals = rng.random(runs)
        rows.append((f"IQM of final scores: {runs} runs", lambda f=finals: stats.bootstrap_ci(f, stats.iqm),
                     scipy_interval((finals,), trimmed)))
        x, y = rng.random(runs), rng.random(runs)
        rows.append((f"P(improvement): {runs} vs {runs} runs",
                     lambda x=x, y=y: stats.probability_of_improvement_ci(x, y),
                     scipy_interval((x, y), mann_whitney_fraction, paired=False)))
    taus = np.linspace(0.0, 1.0, 101)
    scores = rng.random(5)
    above = (scores[:, None] > taus).astype(np.float64)
    rows.append(("profile band: 5 runs x 101 taus", lambda: stats.performance_profile_ci(scores, taus),
                 scipy_interval((above,), np.mean, axis=0)))
    for runs, points in ((5, 1), (20, 41)):
        resampled = rng.random((runs, N_RESAMPLES, points))
        rows.append((f"IQM statistic alone: {runs} x {N_RESAMPLES} x {points}",
                     lambda r=resampled: stats.iqm(r, axis=0), lambda r=resampled: trimmed(r, axis=0)))
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--repeats", type=int, default=30, help="timed calls per row (the best one counts)")
    args = parser.parse_args()
    print(f"{'workload':<44} {'qlab ms':>9} {'scipy ms':>9} {'scipy / qlab':>13}")
    for label, ours, theirs in workloads(np.random.default_rng(0)):
        mine, scipy_ms = best_time(ours, args.repeats), best_time(theirs, args.repeats)
        print(f"{label:<44} {mine:9.2f} {scipy_ms:9.2f} {scipy_ms / mine:13.1f}")


if __name__ == "__main__":
    main()
