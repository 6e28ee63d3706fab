"""State encodings: tile coding, grid bins, RBF and quadratic features against published and library values."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
import scipy.stats
from gymnasium import spaces
from hypothesis import given
from hypothesis import strategies as st

from qlab.features import (
    FeatureConfig,
    GaussianRBF,
    GridBins,
    QuadraticFeatures,
    TileCoder,
    build_features,
    level_bins,
    resolve_bounds,
)
from qlab.tasks.dock import Dock

LOW, HIGH = np.array([-2.0, 0.0]), np.array([2.0, 10.0])
BINS = [4, 5]  # tile widths 1.0 and 2.0
WIDTH = (HIGH - LOW) / np.array(BINS)

coords = st.tuples(st.floats(-3.0, 3.0), st.floats(-1.0, 11.0))  # some points outside the bounds
offsets = st.sampled_from(["uniform", "asymmetric"])


def coder(offset_kind: str, n_tilings: int = 8) -> TileCoder:
    return TileCoder(LOW, HIGH, BINS, n_tilings, offset_kind)


@given(st.lists(coords, min_size=1, max_size=20), offsets, st.integers(1, 9))
def test_one_active_tile_per_tiling(points, offset_kind, n_tilings):
    tiles = coder(offset_kind, n_tilings)
    obs = np.array(points)
    active = tiles.active(obs)
    assert active.shape == (len(points), n_tilings)
    # tile coding definition (Sutton & Barto 2018, sec. 9.5.4): exactly one tile of each tiling is active
    np.testing.assert_array_equal(active // tiles.tiles_per_tiling, np.broadcast_to(np.arange(n_tilings), active.shape))
    dense = tiles(obs).reshape(len(points), n_tilings, tiles.tiles_per_tiling)
    np.testing.assert_array_equal(dense.sum(axis=2), 1.0)
    np.testing.assert_array_equal(tiles.sparse(obs).toarray(), tiles(obs))


@given(coords, offsets)
def test_identical_points_share_every_tile(point, offset_kind):
    tiles = coder(offset_kind)
    active = tiles.active(np.array([point, point]))
    np.testing.assert_array_equal(active[0], active[1])


@given(st.tuples(st.floats(-2.0, 0.0), st.floats(0.0, 6.0)), st.integers(0, 1), st.floats(0.0, 1.0), offsets)
def test_points_a_tile_width_apart_share_no_tile(point, axis, extra, offset_kind):
    # a tile is w wide along each axis, so two points >= w apart along one axis are never in the same tile
    # (Sutton & Barto 2018, sec. 9.5.4); the second point stays inside the bounds (no clipping)
    tiles = coder(offset_kind)
    first = np.array(point)
    second = first.copy()
    second[axis] += WIDTH[axis] * (1.0 + extra)
    active = tiles.active(np.stack([first, second]))
    assert not np.any(active[0] == active[1])


@pytest.mark.parametrize("offset_kind", ["uniform", "asymmetric"])
@pytest.mark.parametrize("axis", [0, 1])
@pytest.mark.parametrize("fraction", [0.0, 0.1, 0.25, 0.5, 0.75, 0.9])
def test_shared_tiles_fall_linearly_with_distance(offset_kind, axis, fraction):
    # Sutton & Barto (2018), sec. 9.5.4: generalisation between two points falls off as 1 - d/w with their
    # distance d < w along an axis, averaged over positions. Dense set of positions over whole tile periods.
    tiles = coder(offset_kind)
    start = LOW + WIDTH  # keep every point and its shifted copy inside the bounds
    positions = np.tile(start, (4000, 1))
    positions[:, axis] += np.linspace(0.0, 2.0 * WIDTH[axis], 4000, endpoint=False)
    positions[:, 1 - axis] += 0.37 * WIDTH[1 - axis]
    shifted = positions.copy()
    shifted[:, axis] += fraction * WIDTH[axis]
    share = np.mean(tiles.active(positions) == tiles.active(shifted))
    assert share == pytest.approx(1.0 - fraction, abs=2e-3)


def test_asymmetric_offsets_follow_odd_displacements():
    # Sutton & Barto (2018), sec. 9.5.4: tiling j is displaced by j * (1, 3, 5, ...) units of w / n
    tiles = TileCoder(np.zeros(3), np.ones(3), [2], 8, "asymmetric")
    expected = np.mod(np.arange(8)[:, None] * np.array([1.0, 3.0, 5.0])[None, :], 8.0) / 8.0
    np.testing.assert_allclose(tiles.offsets, expected)


def off_edge(width: float) -> Callable[[float], bool]:
    """True for points more than 1e-9 from a cell edge (there rounding of x - low may pick either cell)."""
    return lambda x: abs(x / width - round(x / width)) > 1e-9


inside = st.tuples(st.floats(-2.0, 2.0).filter(off_edge(1.0)), st.floats(0.0, 10.0).filter(off_edge(2.0)))


@given(st.lists(inside, min_size=1, max_size=30))
def test_grid_bins_match_numpy_histogram(points):
    grid = GridBins(LOW, HIGH, BINS)
    obs = np.array(points)
    counts = np.bincount(grid.index(obs), minlength=grid.n_features)
    # numpy.histogramdd: the same uniform cells, flattened in C order
    reference, _ = np.histogramdd(obs, bins=BINS, range=list(zip(LOW, HIGH, strict=True)))
    np.testing.assert_array_equal(counts, reference.ravel())


def test_grid_bins_clip_outside_points_to_edge_cells():
    grid = GridBins(LOW, HIGH, BINS)
    # closed form: C-order flat index row * 5 + column of the corner cells
    obs = np.array([[-50.0, -50.0], [50.0, 50.0], [-50.0, 50.0], [50.0, -50.0]])
    np.testing.assert_array_equal(grid.index(obs), [0, 3 * 5 + 4, 4, 3 * 5])


@given(st.lists(coords, min_size=1, max_size=10), st.floats(0.3, 3.0))
def test_rbf_matches_scipy_gaussian_density(points, width):
    rbf = GaussianRBF(LOW, HIGH, [3, 4], width)
    obs = np.clip(np.array(points), LOW, HIGH)
    sigma = width * (HIGH - LOW) / np.array([2, 3])
    phi = rbf(obs)
    assert phi.shape == (len(points), 12)
    for j, centre in enumerate(rbf.centres):
        dist = scipy.stats.multivariate_normal(mean=centre, cov=np.diag(sigma**2))
        # scipy.stats.multivariate_normal: a Gaussian bump is the density divided by its peak value
        np.testing.assert_allclose(phi[:, j], dist.pdf(obs).reshape(-1) / dist.pdf(centre), rtol=1e-9, atol=1e-300)


def test_rbf_centres_span_the_bounds():
    rbf = GaussianRBF(LOW, HIGH, [3, 4], 1.0)
    # closed form: numpy.linspace grid over each range, C order
    expected = np.stack(np.meshgrid(np.linspace(-2, 2, 3), np.linspace(0, 10, 4), indexing="ij"), -1).reshape(-1, 2)
    np.testing.assert_allclose(rbf.centres, expected)


@given(st.integers(1, 4), st.integers(0, 2**32 - 1))
def test_quadratic_weights_are_a_symmetric_matrix(dim, seed):
    rng = np.random.default_rng(seed)
    quad = QuadraticFeatures(dim)
    # closed form: d (d + 1) / 2 monomials, d linear terms and a constant
    assert quad.n_features == dim * (dim + 1) // 2 + dim + 1
    M = rng.normal(size=(dim, dim))
    H, g, c = 0.5 * (M + M.T), rng.normal(size=dim), float(rng.normal())
    z = rng.normal(size=(7, dim))
    w = quad.from_matrix(H, g, c)
    # the quadratic form z'Hz + g'z + c evaluated directly
    np.testing.assert_allclose(quad(z) @ w, np.einsum("bi,ij,bj->b", z, H, z) + z @ g + c, rtol=1e-10, atol=1e-10)
    H2, g2, c2 = quad.to_matrix(w)
    np.testing.assert_allclose(H2, H, atol=1e-12)
    np.testing.assert_allclose(g2, g, atol=1e-12)
    assert c2 == pytest.approx(c)
    w_any = rng.normal(size=quad.n_features)
    H3, g3, c3 = quad.to_matrix(w_any)
    np.testing.assert_array_equal(H3, H3.T)
    np.testing.assert_allclose(quad(z) @ w_any, np.einsum("bi,ij,bj->b", z, H3, z) + z @ g3 + c3, rtol=1e-10)


@pytest.mark.parametrize("kind", ["grid", "tiles", "rbf", "quadratic"])
def test_build_features_from_config(kind):
    space = spaces.Box(LOW.astype(np.float32), HIGH.astype(np.float32))
    fmap = build_features(FeatureConfig(features=kind, bins=BINS, n_tilings=4), space)
    obs = np.array([[0.5, 3.0], [-1.0, 9.0], [5.0, -4.0]])
    np.testing.assert_allclose(fmap.sparse(obs).toarray(), fmap(obs))
    assert fmap(obs).shape == (3, fmap.n_features)


def test_bounds_come_from_the_space_unless_overridden():
    space = spaces.Box(np.array([-1.0, 0.0], dtype=np.float32), np.array([1.0, 4.0], dtype=np.float32))
    lo, hi = resolve_bounds(space, [], [])
    np.testing.assert_array_equal(lo, [-1.0, 0.0])
    np.testing.assert_array_equal(hi, [1.0, 4.0])
    lo, hi = resolve_bounds(space, [-3.0], [5.0, 6.0])
    np.testing.assert_array_equal(lo, [-3.0, -3.0])
    np.testing.assert_array_equal(hi, [5.0, 6.0])


def test_infinite_bounds_need_an_override():
    space = spaces.Box(-np.inf, np.inf, shape=(2,), dtype=np.float32)
    with pytest.raises(ValueError, match="'low' and 'high'"):
        build_features(FeatureConfig(features="tiles"), space)
    fmap = build_features(FeatureConfig(features="tiles", low=[-1.0], high=[1.0]), space)
    assert fmap.n_features > 0
    # quadratic features need no bounds
    assert build_features(FeatureConfig(features="quadratic"), space).n_features == 6


@pytest.mark.parametrize(
    ("settings", "pattern"),
    [
        ({"features": "wavelets"}, r"features must be one of \['grid', 'tiles', 'rbf', 'quadratic'\]"),
        ({"tile_offsets": "random"}, r"tile_offsets must be one of \['uniform', 'asymmetric'\]"),
        ({"n_tilings": 0}, "n_tilings must be an integer >= 1"),
        ({"bins": []}, "bins must be a non-empty list of integers >= 1"),
        ({"bins": [4, 0]}, "bins must be a non-empty list of integers >= 1"),
        ({"rbf_width": -1.0}, "rbf_width must be a finite number > 0"),
    ],
)
def test_bad_feature_settings_raise(settings, pattern):
    with pytest.raises(ValueError, match=pattern):
        FeatureConfig(**settings)


def test_bins_and_bounds_must_match_the_observation_dimension():
    space = spaces.Box(LOW.astype(np.float32), HIGH.astype(np.float32))
    with pytest.raises(ValueError, match=r"bins must hold one value .* one per observation dimension \(2\)"):
        build_features(FeatureConfig(features="grid", bins=[2, 3, 4]), space)
    with pytest.raises(ValueError, match=r"low must hold one value .* one per observation dimension \(2\)"):
        build_features(FeatureConfig(features="grid", low=[0.0, 0.0, 0.0]), space)
    with pytest.raises(ValueError, match="high must exceed low"):
        build_features(FeatureConfig(features="grid", low=[5.0]), space)


# --- one cell per level ---------------------------------------------------------------------------


def test_level_bins_give_each_level_dimension_its_level_count():
    assert level_bins([40], [0, 0, 5, 5]) == [40, 40, 5, 5]
    assert level_bins([30, 30, 3, 3], [0, 0, 5, 5]) == [30, 30, 3, 3]  # a per-dimension list is taken as given
    assert level_bins([40], [0, 0]) == [40]  # nothing at levels: unchanged


@pytest.mark.parametrize("n_levels", [3, 5, 7, 9, 21])
def test_every_pending_level_has_a_cell_and_a_tile_of_its_own(n_levels):
    # The levels of 7, 9 and 21 thrusts are not exact in float32 (e.g. -800 + 1600/6): their own cells must not
    # hang on rounding. Dock with 2 pending thrusts; each row holds one level in both pending dimensions.
    task = Dock(dead_time_steps=2, n_levels=n_levels)
    levels = task.observation_levels()
    assert levels == [0, 0, n_levels, n_levels]
    state = np.zeros((n_levels, 4))
    state[:, 0] = -50.0
    state[:, 2] = state[:, 3] = task.control_levels[:, 0]
    obs = task.observe(state)
    space = task.observation_space
    grid = GridBins(space.low, space.high, level_bins([40], levels))
    assert np.unique(grid.index(obs)).size == n_levels
    tiles = TileCoder(space.low, space.high, level_bins([8], levels), n_tilings=8)
    active = tiles.active(obs)
    assert all(np.unique(active[:, j]).size == n_levels for j in range(8))
