"""Hilbert keys: exact agreement with an independent implementation, and curve properties."""

from __future__ import annotations

import numpy as np
import pytest
from hilbertcurve.hilbertcurve import HilbertCurve
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.points.hilbert import SiteGrid, hilbert_index


def reference(ix: np.ndarray, iy: np.ndarray, order: int) -> np.ndarray:
    # reference: PyPI hilbertcurve, HilbertCurve(p, 2).distance_from_point([x, y]); our convention
    # is its (x, y) order exactly, not swapped
    curve = HilbertCurve(order, 2)
    return np.array(curve.distances_from_points(np.column_stack([ix, iy]).tolist()), dtype=np.uint64)


def all_cells(order: int) -> tuple[np.ndarray, np.ndarray]:
    ix, iy = np.meshgrid(np.arange(1 << order), np.arange(1 << order), indexing="ij")
    return ix.ravel(), iy.ravel()


@pytest.mark.parametrize("order", range(1, 7))
def test_every_cell_matches_hilbertcurve(order: int) -> None:
    ix, iy = all_cells(order)
    np.testing.assert_array_equal(hilbert_index(ix, iy, order), reference(ix, iy, order))


@pytest.mark.parametrize("order", [7, 9, 16, 17, 24, 31])
def test_random_cells_match_hilbertcurve(order: int) -> None:
    rng = np.random.default_rng(order)
    ix = rng.integers(0, 1 << order, 2000)
    iy = rng.integers(0, 1 << order, 2000)
    np.testing.assert_array_equal(hilbert_index(ix, iy, order), reference(ix, iy, order))


def test_first_cells_of_order_one_are_the_stated_convention() -> None:
    # (0,0) -> 0, (0,1) -> 1, (1,1) -> 2, (1,0) -> 3: the curve first steps along y
    assert hilbert_index(np.array([0, 0, 1, 1]), np.array([0, 1, 1, 0]), 1).tolist() == [0, 1, 2, 3]


@settings(max_examples=12, deadline=None)
@given(order=st.integers(1, 7))
def test_keys_are_a_permutation_and_walk_between_neighbours(order: int) -> None:
    ix, iy = all_cells(order)
    keys = hilbert_index(ix, iy, order)
    assert np.array_equal(np.sort(keys), np.arange(4**order, dtype=np.uint64))
    walk = np.argsort(keys)
    steps = np.abs(np.diff(ix[walk])) + np.abs(np.diff(iy[walk]))
    assert (steps == 1).all()  # consecutive keys are edge-adjacent cells


def test_site_grid_from_bounds_round_trip_and_clamp() -> None:
    grid = SiteGrid.from_bounds(512_000.0, 5_401_000.0, 512_800.0, 5_401_500.0, order=10)
    assert SiteGrid.from_dict(grid.to_dict()) == grid
    assert grid.size >= 800.0
    x = np.array([512_000.0, 512_800.0, 511_000.0, 520_000.0])
    y = np.array([5_401_000.0, 5_401_500.0, 5_300_000.0, 5_500_000.0])
    ix, iy = grid.cell_of(x, y)
    assert ix.tolist() == [0, 1023, 0, 1023]  # corners on the grid; outside points clamp to the edge
    assert iy[0] == 0 and iy[2] == 0 and iy[3] == 1023
    np.testing.assert_array_equal(grid.keys(x, y), hilbert_index(ix, iy, 10))


@settings(max_examples=25, deadline=None)
@given(
    st.lists(st.tuples(st.integers(-1000, 600_000), st.integers(-1000, 600_000)), min_size=1, max_size=50),
    st.integers(0, 4),
)
def test_keys_of_units_use_the_exact_cell(points, places: int) -> None:
    grid = SiteGrid(x0=100.0, y0=200.0, size=50.0, order=16)
    offsets = np.array([100, 200]) * 10**places
    units = np.array(points, dtype=np.int64) + offsets
    # exact cell in integer arithmetic: floor((u - origin) * 2^16 / (size * 10^places)), clamped
    scaled = (units - offsets) * 2**16
    denominator = 50 * 10**places
    exact = np.clip(scaled // denominator, 0, 2**16 - 1)
    inside = ((scaled % denominator) != 0).all(axis=1)  # float rounding may pick either side of an edge
    keys = grid.keys_of_units(units[:, 0], units[:, 1], places)
    expected = hilbert_index(exact[:, 0], exact[:, 1], 16)
    np.testing.assert_array_equal(keys[inside], expected[inside])
    real = units / 10.0**places
    np.testing.assert_array_equal(grid.keys(real[:, 0], real[:, 1])[inside], expected[inside])


@settings(max_examples=40, deadline=None)
@given(
    base=st.integers(-2**31, 2**31 - 1 - 2**17),
    near=st.lists(st.tuples(st.integers(0, 2**17), st.integers(0, 2**17)), min_size=2, max_size=50),
    step=st.sampled_from([1, 25, 1000, 10**6, 10**9]),
    shift=st.sampled_from([0, 500_000_000, -123_456, 7_650_000 * 10**6, 2**60]),
)
def test_keys_of_las_integers_equal_keys_of_their_units(base, near, step, shift) -> None:
    """LAS integers with their axis's (step, shift) give the keys of the units X * step + shift
    (points near each other, so that a cell is a step or two wide and an error of one unit shows)."""
    raw = [(base + dx, base + dy) for dx, dy in near]
    pairs = np.array(raw, dtype=np.int32)
    # reference: the units in Python's exact integer arithmetic (int64 holds them for these values)
    units = np.array([[x * step + shift, y * step + shift] for x, y in raw], dtype=np.int64)
    lo, hi = units.min(), units.max()
    grid = SiteGrid.from_bounds(float(lo), float(lo), float(hi), float(hi))
    np.testing.assert_array_equal(
        grid.keys_of_units(pairs[:, 0], pairs[:, 1], 0, (step, step), (shift, shift)),
        grid.keys_of_units(units[:, 0], units[:, 1], 0),
    )


def test_bad_grids_are_refused() -> None:
    with pytest.raises(ValueError, match="size"):
        SiteGrid(0.0, 0.0, 0.0)
    with pytest.raises(ValueError, match="inverted"):
        SiteGrid.from_bounds(10, 0, 0, 10)
    with pytest.raises(ValueError, match="order"):
        hilbert_index(np.array([0]), np.array([0]), 33)
