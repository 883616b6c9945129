"""Labelling pace: labels per active hour, idle gaps left out.

Pure functions over numpy arrays, with the conventions stated in app.reports.rates.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

IDLE_GAP_SECONDS = 900.0
"""Gap between consecutive labels of one annotator above which the time counts as idle (15 min)."""


@dataclass(frozen=True)
class LabellingPace:
    """Labels per active hour.

    ``timed_labels`` are labels that follow another label of the same annotator within the
    idle gap (their labelling time is known); ``active_hours`` is the sum of those gaps.
    """

    labels_per_hour: float
    timed_labels: int
    active_hours: float
    n_labels: int


def labels_per_hour(
    timestamps_seconds: ArrayLike,
    annotator_ids: ArrayLike | None = None,
    idle_gap_seconds: float = IDLE_GAP_SECONDS,
) -> LabellingPace:
    """Labelling pace: timed labels per active hour, idle gaps excluded.

    Definition: sort each annotator's submission times; each gap of at most
    ``idle_gap_seconds`` is the time spent on the label that ends it. Longer gaps are breaks:
    neither the gap nor the label after it (whose working time is unknown) counts. So
    ``labels_per_hour = timed_labels / active_hours``; with several annotators it is labels per
    person-hour. ``nan`` when no gap is timed (fewer than two labels in a session).

    Parameters
    ----------
    timestamps_seconds : array-like of float, shape (n_labels,)
        Submission times in seconds (any epoch).
    annotator_ids : array-like, shape (n_labels,), optional
        Who submitted each label; gaps are only taken within one annotator. None = one person.
    idle_gap_seconds : float, default 900 (15 minutes)
    """
    times = np.asarray(timestamps_seconds, np.float64)
    if times.ndim != 1 or not np.all(np.isfinite(times)):
        raise ValueError("timestamps_seconds must be a 1-D array of finite numbers")
    if idle_gap_seconds <= 0:
        raise ValueError("idle_gap_seconds must be > 0")
    who = np.zeros(len(times), np.int64) if annotator_ids is None else np.asarray(annotator_ids)
    if who.shape != times.shape:
        raise ValueError("annotator_ids must match timestamps_seconds in length")
    order = np.lexsort((times, who))
    gaps = np.diff(times[order])
    same_person = who[order][1:] == who[order][:-1]
    active = same_person & (gaps <= idle_gap_seconds)
    active_seconds = float(gaps[active].sum())
    timed = int(active.sum())
    rate = timed / (active_seconds / 3600.0) if active_seconds > 0 else float("nan")
    return LabellingPace(rate, timed, active_seconds / 3600.0, len(times))
