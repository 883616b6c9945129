"""Each mapped topic brought onto the step grid while the bag streams past, a chunk at a time, so
memory holds a bounded number of messages per topic however long the bag is.

A topic's samples settle the grid steps whose neighbouring samples can no longer change: a sample
is final once a later stamp has come (a later message with the same stamp replaces it), so each
chunk settles the steps before the topic's last final sample and keeps only the samples the open
steps still need (the one at or before the first open step, and those after it). A settled step
gets exactly what resampling the whole topic would give it (`resample.py` looks only at the
samples on either side of a step), so the result does not depend on where chunks begin.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from ...errors import InvalidInput
from ...loops.log_mapping import LogMapping
from . import resample
from .reader import NS, Bag, TopicSeries, describe_time

How = Literal["hold", "linear", "nearest"]
NEVER = np.iinfo(np.int64).max  # the age of a value that never came
MAX_STEPS = 20_000_000  # a bag mapped to more steps than this is refused (bounded memory)
# messages a topic buffers before they are settled onto the grid: enough that numpy's work per
# chunk outweighs Python's, few enough that a chunk of every topic is a few MB at most
CHUNK = 4096


@dataclass
class Clock:
    """The step grid: a step every `period` ns from `begin` up to `end`. Until the stream ends,
    `end` is the newest time known to lie on the grid (the newest stamp of a required topic)."""

    begin: int
    period: int
    end: int

    def count(self) -> int:
        """Steps from `begin` up to `end`."""
        return (self.end - self.begin) // self.period + 1 if self.end >= self.begin else 0

    def before(self, limit: int) -> int:
        """Steps earlier than `limit`."""
        return max(0, -((self.begin - limit) // self.period))

    def times(self, first: int, stop: int) -> np.ndarray:
        """Times (ns) of steps first..stop-1, shape (stop - first,), int64."""
        return self.begin + np.arange(first, stop, dtype=np.int64) * self.period


def values_for_resampling(raw: np.ndarray, numeric: bool) -> np.ndarray:
    """A source's values for resampling: lists of numbers stacked into (n, width) float64;
    numbers as float64; anything else (text, lists whose length changes) as objects."""
    if raw.dtype != object or len(raw) == 0:
        return raw
    if isinstance(raw[0], np.ndarray):
        if len({len(v) for v in raw}) != 1:
            return raw  # lengths change between messages: refused when stacked
        return np.stack(list(raw)).astype(np.float64)
    if numeric:
        try:
            return raw.astype(np.float64)
        except (TypeError, ValueError):
            pass
    return raw


def settle(
    how: How, times: np.ndarray, raw: np.ndarray, numbers: np.ndarray, steps: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """One source's values at the given steps from the samples around them.

    Parameters
    ----------
    how : "hold" (newest value), "linear" (interpolated numbers) or "nearest" (camera frames)
    times : ndarray of shape (n,), int64, strictly increasing, n >= 1
    raw : ndarray of shape (n,), the samples' values (float64 or objects; unused for nearest)
    numbers : ndarray of shape (n,), int64, each sample's message number within its topic
    steps : ndarray of shape (m,), int64, step times

    Returns
    -------
    values : ndarray of shape (m, ...); for nearest shape (m, 2): message number and stamp
    age : ndarray of shape (m,), int64 (for nearest: the distance to the frame)
    """
    if how == "nearest":
        index, distance = resample.nearest(times, steps)
        return np.stack([numbers[index], times[index]], axis=1), distance
    values = values_for_resampling(raw, numeric=how == "linear")
    if how == "linear" and values.dtype != object:
        return resample.linear(times, values, steps)
    index, age = resample.hold(times, steps)
    return values[np.maximum(index, 0)], age


@dataclass
class TopicGrid:
    """One topic on the grid: the samples still needed (`times`, `numbers`, `values`) and the
    settled steps' values and ages by source, in pieces."""

    topic: str
    msgtype: str
    stamp_field: str
    how: dict[str, How]
    start_ns: int
    times: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    numbers: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    values: dict[str, np.ndarray] = field(default_factory=dict)
    taken: int = 0  # messages taken so far
    settled: int = 0  # steps settled so far
    pieces: dict[str, list[tuple[np.ndarray, np.ndarray]]] = field(default_factory=dict)
    widths: dict[str, set[int]] = field(default_factory=dict)  # list lengths seen by source

    def last_time(self) -> int | None:
        return int(self.times[-1]) if len(self.times) else None

    def take(
        self,
        times: np.ndarray,
        values: dict[str, np.ndarray],
        clock: Clock,
        *,
        final: bool = False,
    ) -> None:
        """Add a chunk of messages (times in arrival order, values by source) and settle every
        step they make final; `final`: the topic's last chunk, settle up to the clock's end."""
        numbers = self.taken + np.arange(len(times), dtype=np.int64)
        self.taken += len(times)
        for name, raw in values.items():
            if raw.dtype == object and len(raw) and isinstance(raw[0], np.ndarray):
                self.widths.setdefault(name, set()).update({len(v) for v in raw})
        times = np.concatenate([self.times, times])
        numbers = np.concatenate([self.numbers, numbers])
        joined = {n: _join(self.values.get(n), v) for n, v in values.items()}
        self._check_order(times, numbers)
        kept = resample.last_of_equal_times(times)
        times, numbers = times[kept], numbers[kept]
        joined = {n: v[kept] for n, v in joined.items()}
        if final:
            stop = clock.count()
        elif len(times) >= 2:  # all but the last stamp are final
            stop = min(clock.count(), clock.before(int(times[-2])))
        else:
            stop = self.settled
        if stop > self.settled and len(times):
            steps = clock.times(self.settled, stop)
            for name, how in self.how.items():
                piece = settle(how, times, joined.get(name, times), numbers, steps)
                self.pieces.setdefault(name, []).append(piece)
            self.settled = stop
        if len(times):  # keep the sample at or before the next open step, and all after it
            next_open = clock.begin + stop * clock.period
            first = max(int(np.searchsorted(times, next_open, side="right")) - 1, 0)
            times, numbers = times[first:], numbers[first:]
            joined = {n: v[first:] for n, v in joined.items()}
        self.times, self.numbers, self.values = times, numbers, joined

    def _check_order(self, times: np.ndarray, numbers: np.ndarray) -> None:
        """Stamps must not go back; name the message (its number in the topic) and both times."""
        back = np.flatnonzero(np.diff(times) < 0)
        if back.size:
            i = int(back[0]) + 1
            raise InvalidInput(
                f"topic {self.topic}, field {self.stamp_field}: message {int(numbers[i]) + 1} at "
                f"{describe_time(int(times[i]), self.start_ns)} is earlier than the message "
                f"before it at {describe_time(int(times[i - 1]), self.start_ns)}; stamps must not "
                "go back in time"
            )

    def on_grid(self, name: str, steps: int) -> tuple[np.ndarray, np.ndarray]:
        """A source's values and ages at every step (after the final chunk). A topic without
        messages gives none everywhere, aged NEVER; lists whose length changed between messages
        come as objects, for the caller to refuse where they count."""
        pieces = self.pieces.get(name, [])
        if not pieces:
            if self.how[name] == "nearest":
                return np.zeros((steps, 2), np.int64), np.full(steps, NEVER, np.int64)
            return np.full(steps, None, dtype=object), np.full(steps, NEVER, np.int64)
        ages = np.concatenate([age for _, age in pieces])
        if len(self.widths.get(name, ())) > 1:
            rows = [row for values, _ in pieces for row in values]
            values = np.empty(len(rows), dtype=object)
            for i, row in enumerate(rows):
                values[i] = row
            return values, ages
        return np.concatenate([values for values, _ in pieces]), ages


def _join(carried: np.ndarray | None, new: np.ndarray) -> np.ndarray:
    if carried is None or len(carried) == 0:
        return new
    if len(new) == 0:
        return carried
    if carried.dtype != new.dtype:
        return np.concatenate([carried.astype(object), new.astype(object)])
    return np.concatenate([carried, new])


@dataclass
class OnGrid:
    """Every mapped source at every step: the step times and each topic's grid."""

    steps: np.ndarray  # (n,) int64 step times
    topics: dict[str, TopicGrid]

    def source(self, topic: str, name: str) -> tuple[np.ndarray, np.ndarray]:
        """A source's values and ages (ns) at every step."""
        return self.topics[topic].on_grid(name, len(self.steps))


def stream_onto_grid(bag: Bag, mapping: LogMapping, *, chunk: int | None = None) -> OnGrid:
    """Read the bag through the mapping onto its step grid in one pass, `chunk` (default
    CHUNK) messages a topic at a time.

    The grid starts when every required topic (features, mode) has spoken, found first by
    reading only until each has; it ends at the last message of any of them.
    """
    plans = bag.prepare(mapping)
    required = {s.topic for n, s in mapping.value_sources().items() if n.startswith("feature:")}
    if mapping.control is not None:
        required.add(mapping.control.topic)
    firsts = bag.first_stamps(plans, required)
    for topic in sorted(required):
        if topic not in firsts:
            raise InvalidInput(f"topic {topic}: the bag holds no messages on it")
    clock = Clock(max(firsts.values()), round(NS / mapping.step_rate_hz), max(firsts.values()))
    grids = {
        topic: TopicGrid(
            topic, series.msgtype, series.stamp_field, _hows(series, mapping), bag.start_ns
        )
        for topic, series in plans.items()
    }

    def newest_required() -> int:
        """The newest stamp of any required topic read so far: the grid reaches at least it."""
        newest = clock.end
        for topic in required:
            last = plans[topic].last_time()
            if last is None:
                last = grids[topic].last_time()
            if last is not None:
                newest = max(newest, last)
        return newest

    def on_chunk(series: TopicSeries) -> None:
        clock.end = newest_required()
        _check_steps(clock, mapping.step_rate_hz, at_least=True)
        times, values = series.take()
        grids[series.topic].take(times, values, clock)

    bag.stream(plans, on_chunk, chunk=chunk or CHUNK)
    clock.end = newest_required()
    _check_steps(clock, mapping.step_rate_hz, at_least=False)
    for topic, series in plans.items():
        times, values = series.take()
        grids[topic].take(times, values, clock, final=True)
    return OnGrid(clock.times(0, clock.count()), grids)


def _hows(series: TopicSeries, mapping: LogMapping) -> dict[str, How]:
    """How each source of a topic comes onto the grid: numbers as the topic's rule says;
    modes, discrete actions and scenes held; camera frames the nearest."""
    rule = mapping.rule(series.topic).resample
    numeric = (
        "feature:",
        "learner_action:",  # a continuous action's dimension
        "expert_action:",
        "learner_probs",
        "learner_ensemble",
        "learner_std",
    )
    hows: dict[str, How] = {
        name: rule if name.startswith(numeric) else "hold" for name in series.values
    }
    if mapping.image is not None and mapping.image.topic == series.topic:
        hows["image"] = "nearest"
    return hows


def _check_steps(clock: Clock, rate_hz: float, *, at_least: bool) -> None:
    n = clock.count()
    if n > MAX_STEPS:
        raise InvalidInput(
            f"the bag maps to {'at least ' if at_least else ''}{n} steps at {rate_hz:g} Hz, "
            f"more than {MAX_STEPS} in one upload; split the bag"
        )
