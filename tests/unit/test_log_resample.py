"""Resampling a topic onto the step grid, against reference libraries (docs/references.md,
"Resampling onto a step grid: numpy.interp and scipy.interpolate.interp1d")."""

from __future__ import annotations

import numpy as np
from scipy.interpolate import interp1d

from expertloop.ingest.logs import fieldpath, resample

rng = np.random.default_rng(11)
TIMES = np.cumsum(rng.integers(20_000_000, 80_000_000, size=200)).astype(np.int64)
VALUES = rng.standard_normal(200)
GRID = np.arange(TIMES[0] - 30_000_000, TIMES[-1] + 90_000_000, 7_000_000, dtype=np.int64)


def test_linear_matches_numpy_interp():
    got, age = resample.linear(TIMES, VALUES, GRID)
    inside = GRID >= TIMES[0]
    # numpy.interp holds the last value past the end, as the service does
    expected = np.interp(GRID[inside].astype(float), TIMES.astype(float), VALUES)
    np.testing.assert_allclose(got[inside], expected, rtol=1e-12, atol=1e-12)
    assert (age[~inside] == np.iinfo(np.int64).max).all()


def test_linear_interpolates_each_column_of_vectors():
    vectors = np.stack([VALUES, 2 * VALUES + 1], axis=1)
    got, _ = resample.linear(TIMES, vectors, GRID)
    inside = GRID >= TIMES[0]
    for j in range(2):
        expected = np.interp(GRID[inside].astype(float), TIMES.astype(float), vectors[:, j])
        np.testing.assert_allclose(got[inside, j], expected, rtol=1e-12, atol=1e-12)


def test_linear_age_is_the_larger_distance_to_the_two_samples():
    _, age = resample.linear(TIMES, VALUES, GRID)
    for g, a in zip(GRID, age, strict=True):
        before = TIMES[TIMES <= g]
        after = TIMES[TIMES >= g]
        if len(before) == 0:
            continue
        if len(after) == 0:
            assert a == g - before[-1]
        elif before[-1] == g:
            assert a == 0
        else:
            assert a == max(g - before[-1], after[0] - g)


def test_hold_matches_scipy_previous():
    index, age = resample.hold(TIMES, GRID)
    reference = interp1d(
        TIMES.astype(float),
        np.arange(len(TIMES)),
        kind="previous",
        bounds_error=False,
        fill_value=(-1, len(TIMES) - 1),
    )(GRID.astype(float))
    np.testing.assert_array_equal(index, reference.astype(int))
    seen = index >= 0
    np.testing.assert_array_equal(age[seen], GRID[seen] - TIMES[index[seen]])


def test_nearest_matches_scipy_nearest():
    index, distance = resample.nearest(TIMES, GRID)
    reference = interp1d(
        TIMES.astype(float),
        np.arange(len(TIMES)),
        kind="nearest",
        bounds_error=False,
        fill_value=(0, len(TIMES) - 1),
    )(GRID.astype(float))
    # the times are whole nanoseconds apart and the grid rarely falls exactly midway; where it
    # does, scipy and we may pick different neighbours at the same distance
    same = index == reference.astype(int)
    np.testing.assert_array_equal(
        distance[~same], np.abs(GRID - TIMES[reference.astype(int)])[~same]
    )
    np.testing.assert_array_equal(distance, np.abs(GRID - TIMES[index]))


def test_last_of_equal_times_keeps_the_later_message():
    times = np.array([1, 2, 2, 3, 3, 3, 4], dtype=np.int64)
    assert resample.last_of_equal_times(times).tolist() == [0, 2, 5, 6]


def test_field_path_tokens_and_getter():
    assert fieldpath.tokens("poses[0].pose.position.x") == ["poses", 0, "pose", "position", "x"]
    assert fieldpath.tokens("velocity[3]") == ["velocity", 3]

    class Message:
        def __init__(self, **kw):
            self.__dict__.update(kw)

    message = Message(poses=[Message(pose=Message(position=Message(x=4.5)))], velocity=[0, 1, 2, 7])
    assert fieldpath.getter("poses[0].pose.position.x")(message) == 4.5
    assert fieldpath.getter("velocity[3]")(message) == 7
