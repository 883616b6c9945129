"""Bags are brought onto the step grid in chunks of a bounded number of messages per topic: the
chunked result is exactly the one-chunk result wherever the chunks begin, and memory does not grow
with the number of messages (the values themselves are checked against the messages written in
test_log_upload.py, also with small chunks)."""

from __future__ import annotations

import copy
import gc
import tracemalloc

import numpy as np
import pytest

from expertloop.errors import InvalidInput
from expertloop.ingest.logs.reader import open_bag
from expertloop.ingest.logs.steps import MappedLog, map_log
from expertloop.ingest.logs.writer import storage_file, typestore_for, write_bag
from expertloop.loops.log_mapping import LogMapping
from tests.logs.bags import MAPPING, NS, T0, TOPICS, tractor_messages

WHOLE = 1_000_000  # more messages than any topic of these bags has: one chunk
CHUNKS = (1, 2, 3, 5, 16)


def _map(path, mapping, chunk, **kwargs):
    with open_bag(path) as bag:
        return map_log(
            bag,
            LogMapping.model_validate(mapping),
            stem="run",
            default_control="learner",
            chunk=chunk,
            **kwargs,
        )


def _same(got: MappedLog, expected: MappedLog) -> None:
    assert expected.table is not None and got.table is not None
    assert got.table.equals(expected.table), got.table.to_pydict()
    np.testing.assert_array_equal(got.row_time_ns, expected.row_time_ns)
    assert got.row_key == expected.row_key
    assert (got.grid_steps, got.dropped, got.absent, got.short_segments) == (
        expected.grid_steps,
        expected.dropped,
        expected.absent,
        expected.short_segments,
    )


def _bag(tmp_path, messages, name="run"):
    return storage_file(write_bag(tmp_path / name, "mcap", TOPICS, messages, typestore_for("mcap")))


def _gappy(seconds=6.0):
    """joint_states silent for 1.5 s, teleop only during a takeover, odom stamped 7 ms early."""
    messages, written = tractor_messages(
        "mcap", seconds=seconds, takeover=(2.0, 3.0), stamp_lag_ns=7_000_000
    )
    silent = (written.times["/joint_states"][40], written.times["/joint_states"][70])
    return [m for m in messages if not (m[0] == "/joint_states" and silent[0] < m[1] < silent[1])]


@pytest.mark.parametrize(
    "mapping",
    [
        MAPPING,
        {**MAPPING, "rollouts": {"split": "segments", "on_mode_change": True, "gap_s": 0.5}},
        {
            **MAPPING,
            "topics": {"/odom": {"resample": "hold"}, "/policy/probs": {"resample": "linear"}},
        },
    ],
    ids=["bag", "segments", "hold-and-linear-lists"],
)
def test_chunks_give_exactly_the_one_chunk_steps(mapping, tmp_path):
    path = _bag(tmp_path, _gappy())
    whole = _map(path, mapping, WHOLE)
    assert whole.table is not None and whole.table.num_rows > 40
    assert whole.dropped  # the silence drops steps: chunks must agree on which
    for chunk in CHUNKS:
        _same(_map(path, mapping, chunk), whole)


def test_duplicate_stamps_across_chunk_edges_keep_the_last_message(tmp_path):
    """Each odometry message is followed 500 ns later by one with the same header stamp and
    another position; the later one counts, wherever a chunk ends (between the two or not)."""
    messages, written = tractor_messages("mcap")
    doubled = []
    for topic, t, message in messages:
        doubled.append((topic, t, message))
        if topic == "/odom":
            again = copy.deepcopy(message)
            again.pose.pose.position.x += 100.0
            doubled.append((topic, t + 500, again))
    path = _bag(tmp_path, doubled)
    whole = _map(path, MAPPING, WHOLE)
    assert whole.table is not None
    # numpy.interp over the later messages' positions is the reference (docs/references.md,
    # "Resampling onto a step grid: numpy.interp and scipy.interpolate.interp1d")
    odom_t = (np.array(written.times["/odom"]) - T0).astype(np.float64)
    later_x = np.array([x for x, _ in written.values["/odom"]]) + 100.0
    expected = np.interp((whole.row_time_ns - T0).astype(np.float64), odom_t, later_x)
    gap = np.array(whole.table.column("features").to_pylist())[:, 0]
    np.testing.assert_allclose(gap, expected, rtol=1e-9)
    for chunk in CHUNKS:
        _same(_map(path, MAPPING, chunk), whole)


@pytest.mark.parametrize("chunk", [1, 4, 9, WHOLE])
def test_stamps_going_back_are_named_wherever_the_chunk_ends(chunk, tmp_path):
    messages, written = tractor_messages("mcap")
    swapped = written.times["/odom"][9] - 30_000_000  # message 11 stamped before message 10
    odom = [i for i, m in enumerate(messages) if m[0] == "/odom"]
    topic, t, message = messages[odom[10]]
    Time = typestore_for("mcap").types["builtin_interfaces/msg/Time"]
    message.header.stamp = Time(sec=swapped // NS, nanosec=swapped % NS)
    path = _bag(tmp_path, messages)
    with pytest.raises(InvalidInput) as refused:
        _map(path, MAPPING, chunk)
    assert (
        "topic /odom, field header.stamp: message 11 at 0.420 s into the bag (stamp 1700000000.423"
        in str(refused.value.message)
    )
    assert "earlier than the message before it at 0.450 s" in refused.value.message


def test_refusal_of_a_missing_value_is_the_same_in_chunks(tmp_path):
    mapping = {**MAPPING, "on_missing": "refuse"}
    path = _bag(tmp_path, _gappy())
    messages = set()
    for chunk in (*CHUNKS, WHOLE):
        with pytest.raises(InvalidInput) as refused:
            _map(path, mapping, chunk)
        messages.add(refused.value.message)
    [message] = messages
    assert message.startswith("topic /joint_states, field velocity[3]: no value within 0.25 s")


def _busy_bag(tmp_path, per_topic: int, name: str):
    """`per_topic` messages on each of five topics over the same 4 s (so the same 40 steps at
    10 Hz, however many messages): numbers, an action, a list of probabilities and a mode."""
    T = typestore_for("mcap").types
    topics = {
        "/gap": "std_msgs/msg/Float64",
        "/speed": "std_msgs/msg/Float64",
        "/policy/action": "std_msgs/msg/Int32",
        "/policy/probs": "std_msgs/msg/Float32MultiArray",
        "/mode": "std_msgs/msg/String",
    }
    layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
    period = 4 * NS // (per_topic - 1)

    def messages():
        for i in range(per_topic):
            t = T0 + i * period
            yield "/gap", t, T["std_msgs/msg/Float64"](data=10.0 - i / per_topic)
            yield "/speed", t + 1, T["std_msgs/msg/Float64"](data=float(i % 7))
            yield "/policy/action", t + 2, T["std_msgs/msg/Int32"](data=i % 3)
            probs = np.array([0.2, 0.3, 0.5], dtype=np.float32)[np.roll(np.arange(3), i)]
            yield (
                "/policy/probs",
                t + 3,
                T["std_msgs/msg/Float32MultiArray"](layout=layout, data=probs),
            )
            yield "/mode", t + 4, T["std_msgs/msg/String"](data="MANUAL" if i % 2 else "AUTO")

    bag = write_bag(tmp_path / name, "mcap", topics, messages(), typestore_for("mcap"))
    return storage_file(bag)


BUSY_MAPPING = {
    "step_rate_hz": 10,
    "max_age_s": 0.25,
    "topics": {"/speed": {"resample": "linear"}},
    "features": {
        "gap_m": {"topic": "/gap", "field": "data"},
        "speed": {"topic": "/speed", "field": "data"},
    },
    "learner_action": {"topic": "/policy/action", "field": "data"},
    "learner_probs": {"topic": "/policy/probs", "field": "data"},
    "control": {
        "topic": "/mode",
        "field": "data",
        "values": {"AUTO": "learner", "MANUAL": "expert"},
    },
}


def _traced_peaks(path, chunk):
    """Peak bytes traced while merely reading and decoding every message of the bag, and
    while mapping it, above what was allocated before."""
    with open_bag(path) as bag:
        gc.collect()
        tracemalloc.start()
        try:
            before = tracemalloc.get_traced_memory()[0]
            for connection, _, raw in bag.reader.messages():
                bag.reader.deserialize(raw, connection.msgtype)
            read = tracemalloc.get_traced_memory()[1] - before
        finally:
            tracemalloc.stop()
    with open_bag(path) as bag:
        mapping = LogMapping.model_validate(BUSY_MAPPING)
        gc.collect()
        tracemalloc.start()
        try:
            before = tracemalloc.get_traced_memory()[0]
            mapped = map_log(bag, mapping, stem="run", default_control="learner", chunk=chunk)
            mapped_peak = tracemalloc.get_traced_memory()[1] - before
        finally:
            tracemalloc.stop()
    assert mapped.table is not None and mapped.grid_steps == 40
    return read, mapped_peak


def test_memory_does_not_grow_with_the_messages(tmp_path):
    """Mapping 4x the messages onto the same 40 steps takes no more memory above what the
    reading library itself takes to read them (its own peak grows with its chunks up to a
    few MB): a few hundred kB for the chunks of five topics. The one-pass reading this
    replaced kept about 35 bytes a message: 1.7 MB more here."""
    small = _busy_bag(tmp_path, 3_200, "small")  # 16,000 messages
    large = _busy_bag(tmp_path, 12_800, "large")  # 64,000 messages
    _traced_peaks(small, 256)  # warm up: the decoders rosbags builds once per type
    small_read, small_mapped = _traced_peaks(small, 256)
    large_read, large_mapped = _traced_peaks(large, 256)
    print(
        f"traced peaks, reading / mapping: {small_read} / {small_mapped} bytes for 16,000 "
        f"messages, {large_read} / {large_mapped} for 64,000"
    )
    grown = (large_mapped - large_read) - (small_mapped - small_read)
    assert grown < 300_000, f"{grown} bytes more for 48,000 more messages"
    assert large_mapped - large_read < 1_000_000
