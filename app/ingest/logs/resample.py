"""Bring a topic's samples onto the step grid: last value held or linear interpolation, with
the age of the information each step gets. Pure numpy; times in integer nanoseconds."""

from __future__ import annotations

import numpy as np


def last_of_equal_times(times: np.ndarray) -> np.ndarray:
    """Indexes that keep the last of each run of equal times (a later message replaces an
    earlier one with the same stamp).

    times : ndarray of shape (n,), int64, non-decreasing
    """
    if len(times) == 0:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(np.r_[times[1:] != times[:-1], True])


def hold(times: np.ndarray, grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The newest sample at or before each grid time, and its age.

    Parameters
    ----------
    times : ndarray of shape (n,), int64, strictly increasing sample times
    grid : ndarray of shape (m,), int64, step times

    Returns
    -------
    index : ndarray of shape (m,), int64, sample index (-1 where no sample came yet)
    age : ndarray of shape (m,), int64, grid time minus sample time (max int64 where none)
    """
    index = np.searchsorted(times, grid, side="right") - 1
    age = np.full(len(grid), np.iinfo(np.int64).max, dtype=np.int64)
    seen = index >= 0
    age[seen] = grid[seen] - times[index[seen]]
    return index, age


def linear(
    times: np.ndarray, values: np.ndarray, grid: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Values interpolated linearly between the samples around each grid time, and the age:
    the larger distance to those two samples (an exact hit has age 0).

    Parameters
    ----------
    times : ndarray of shape (n,), int64, strictly increasing
    values : ndarray of shape (n, ...), float64
    grid : ndarray of shape (m,), int64

    Returns
    -------
    out : ndarray of shape (m, ...), float64 (the held value where there is no later sample)
    age : ndarray of shape (m,), int64 (max int64 before the first sample)
    """
    before, age_before = hold(times, grid)
    after = np.minimum(before + 1, len(times) - 1)
    exact_or_last = (before < 0) | (after == before)
    safe_before = np.maximum(before, 0)
    span = (times[after] - times[safe_before]).astype(np.float64)
    offset = (grid - times[safe_before]).astype(np.float64)
    weight = np.where(exact_or_last | (span == 0), 0.0, offset / np.where(span == 0, 1, span))
    weight = weight.reshape((-1,) + (1,) * (values.ndim - 1))
    out = values[safe_before] * (1.0 - weight) + values[after] * weight
    age = np.where(exact_or_last, age_before, np.maximum(age_before, times[after] - grid)).astype(
        np.int64
    )
    age[before < 0] = np.iinfo(np.int64).max
    exact = (before >= 0) & (age_before == 0)
    age[exact] = 0
    return out, age


def nearest(times: np.ndarray, grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The sample nearest in time to each grid time (earlier one on a tie), and the distance.

    times : ndarray of shape (n,), int64, strictly increasing, n >= 1
    grid : ndarray of shape (m,), int64
    """
    after = np.clip(np.searchsorted(times, grid, side="left"), 0, len(times) - 1)
    before = np.maximum(after - 1, 0)
    take_before = np.abs(grid - times[before]) <= np.abs(times[after] - grid)
    index = np.where(take_before, before, after)
    return index, np.abs(grid - times[index])
