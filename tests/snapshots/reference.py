"""Slow, obvious references for snapshot tests: rows from plain SQL, consensus and hash by hand.

Nothing here imports the code under test: rows are read with plain SQL text, consensus is a
Counter majority or statistics.median, and the content hash is packed row by row with struct,
following the scheme written in app/snapshots/content_hash.py's docstring.
"""

from __future__ import annotations

import hashlib
import statistics
import struct
from collections import Counter, defaultdict
from typing import Any

from sqlalchemy import Engine, text

SOURCE_CODES = {"demonstration": 0, "takeover": 1, "relabel": 2}


def loop_row(engine: Engine, slug: str) -> dict[str, Any]:
    with engine.connect() as conn:
        found = conn.execute(text("SELECT * FROM loops WHERE slug = :s"), {"s": slug}).mappings()
        return dict(found.one())


def _floats(blob: bytes) -> list[float]:
    return list(struct.unpack(f"<{len(blob) // 4}f", blob))


def reference_rows(
    engine: Engine,
    *,
    slug: str,
    up_to_round: int,
    max_step_id: int,
    max_label_id: int,
    action_space: dict[str, Any],
    tolerance: list[float] | None = None,
) -> list[dict[str, Any]]:
    """The training set as plain dicts in step-id order (the export's columns)."""
    discrete = action_space["kind"] == "discrete"
    with engine.connect() as conn:
        loop_id = conn.execute(text("SELECT id FROM loops WHERE slug = :s"), {"s": slug}).scalar()
        steps = conn.execute(
            text(
                "SELECT s.id, s.features, s.control, s.expert_action, s.expert_action_vec, "
                "s.step_index, r.number, r.learner_version, ro.key "
                "FROM steps s JOIN rounds r ON r.id = s.round_id "
                "JOIN rollouts ro ON ro.id = s.rollout_id "
                "WHERE r.loop_id = :loop AND s.id <= :max_step ORDER BY s.id"
            ),
            {"loop": loop_id, "max_step": max_step_id},
        ).all()
        labels = conn.execute(
            text(
                "SELECT l.step_id, l.answer, l.action, l.action_vec, l.user_id, l.span "
                "FROM labels l JOIN rounds r ON r.id = l.round_id "
                "WHERE r.loop_id = :loop AND r.number <= :up AND l.id <= :max_label "
                "ORDER BY l.id"
            ),
            {"loop": loop_id, "up": up_to_round, "max_label": max_label_id},
        ).all()
    # one vote per annotator and state: their direct answer, else their latest span copy
    voting: dict[tuple[int, int], Any] = {}
    for label in labels:
        held = voting.get((label.step_id, label.user_id))
        if held is None or held.span or not label.span:
            voting[(label.step_id, label.user_id)] = label
    answers: dict[int, list[Any]] = defaultdict(list)
    for step_id, answer, action, vec, _user, _span in voting.values():
        if answer == "unsure":
            answers[step_id].append(None)
        else:
            answers[step_id].append(action if discrete else [float(v) for v in _floats(vec)])
    if tolerance is None and not discrete:
        tolerance = [(d["high"] - d["low"]) * 0.1 for d in action_space["dimensions"]]
    rows = []
    for sid, features, control, e_action, e_vec, step_index, number, version, key in steps:
        row = {
            "step_id": sid,
            "features": _floats(bytes(features)),
            "round": number,
            "learner_version": version,
            "rollout": key,
            "step": step_index,
        }
        if control == 1 and number <= up_to_round:
            row |= {
                "expert_action": e_action if discrete else _floats(bytes(e_vec)),
                "source": "demonstration" if number == 0 else "takeover",
                "label_count": 1,
                "agreement": 1.0,
            }
        elif control == 0 and sid in answers:
            found = (_majority if discrete else _median)(answers[sid], tolerance)
            if found is None:
                continue
            row |= found | {"source": "relabel", "label_count": len(answers[sid])}
        else:
            continue
        rows.append(row)
    return rows


def _majority(answers: list[Any], _tolerance: Any) -> dict[str, Any] | None:
    votes = Counter(a for a in answers if a is not None)
    ranked = votes.most_common()
    if not ranked or (len(ranked) > 1 and ranked[0][1] == ranked[1][1]):
        return None  # no votes, or a tie: unresolved
    action, count = ranked[0]
    return {"expert_action": action, "agreement": count / sum(votes.values())}


def _median(answers: list[Any], tolerance: list[float]) -> dict[str, Any] | None:
    votes = [a for a in answers if a is not None]
    if not votes:
        return None
    middle = [statistics.median(v[d] for v in votes) for d in range(len(votes[0]))]
    agreeing = sum(
        all(abs(v[d] - middle[d]) <= tolerance[d] for d in range(len(middle))) for v in votes
    )
    # exported as float32, like every stored vector
    as_f32 = list(struct.unpack(f"<{len(middle)}f", struct.pack(f"<{len(middle)}f", *middle)))
    return {"expert_action": as_f32, "agreement": agreeing / len(votes)}


def reference_hash(
    rows: list[dict[str, Any]], *, n_features: int, discrete: bool, width: int
) -> str:
    """The content hash of rows, packed one row at a time (scheme expertloop-rows-1)."""
    parts = {
        name: hashlib.sha256()
        for name in (
            "step_id",
            "features",
            "action",
            "round",
            "source",
            "step",
            "label_count",
            "agreement",
        )
    }
    rollout = hashlib.sha256()
    runs: list[list[Any]] = []
    versions: dict[int, str | None] = {}
    for row in rows:
        parts["step_id"].update(struct.pack("<q", row["step_id"]))
        parts["features"].update(struct.pack(f"<{n_features}f", *row["features"]))
        if discrete:
            parts["action"].update(struct.pack("<q", row["expert_action"]))
        else:
            parts["action"].update(struct.pack(f"<{width}f", *row["expert_action"]))
        parts["round"].update(struct.pack("<q", row["round"]))
        parts["source"].update(struct.pack("<B", SOURCE_CODES[row["source"]]))
        parts["step"].update(struct.pack("<q", row["step"]))
        parts["label_count"].update(struct.pack("<q", row["label_count"]))
        parts["agreement"].update(struct.pack("<d", row["agreement"]))
        if runs and runs[-1][0] == row["rollout"]:
            runs[-1][1] += 1
        else:
            runs.append([row["rollout"], 1])
        versions[row["round"]] = row["learner_version"]
    for key, length in runs:
        encoded = key.encode("utf-8")
        rollout.update(struct.pack("<I", len(encoded)) + encoded + struct.pack("<Q", length))
    by_round = hashlib.sha256()
    for number in sorted(versions):
        name = versions[number]
        encoded = b"" if name is None else name.encode("utf-8")
        length = 0xFFFFFFFF if name is None else len(encoded)
        by_round.update(struct.pack("<qI", number, length) + encoded)
    final = hashlib.sha256(
        b"expertloop-rows-1" + struct.pack("<qBq", n_features, 1 if discrete else 0, width)
    )
    for name, part in [*parts.items(), ("rollout", rollout), ("learner_version", by_round)]:
        final.update(name.encode("utf-8") + part.digest())
    return final.hexdigest()


def as_tuples(rows: list[dict[str, Any]]) -> set[tuple[Any, ...]]:
    """Rows as hashable tuples (features and vectors as tuples), for set comparisons."""
    out = set()
    for row in rows:
        action = row["expert_action"]
        out.add(
            (
                row["step_id"],
                tuple(row["features"]),
                tuple(action) if isinstance(action, list) else action,
                row["round"],
                row["source"],
                row["learner_version"],
                row["rollout"],
                row["step"],
                row["label_count"],
                row["agreement"],
            )
        )
    return out
