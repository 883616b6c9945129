"""Run whole DAgger rounds of the invented demo through the HTTP API, as a team would.

Each round: roll out the current learner in the simulator (a safety driver takes over where the
scripted expert says so), upload, rank, let the scripted expert answer the queue, snapshot, pull,
retrain, and measure the new learner in closed loop. All numbers are invented for the demo.
"""

from __future__ import annotations

import tempfile
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..client import Client
from . import expert, learner, scenario, sim
from .files import to_table, write_parquet

DEMONSTRATION_ROLLOUTS = 4
ROLLOUTS_PER_ROUND = 10
EVALUATION_ROLLOUTS = 60
JOB_POLL_SECONDS = 0.2


@dataclass
class RoundRow:
    """One line of the per-round table."""

    round: int
    labels_used: int
    audit_count: int
    audit_n: int
    audit_disagreement: float | None
    audit_lower: float | None
    audit_upper: float | None
    audit_quoted: bool
    shift_mmd2: float | None
    conflicts_per_100: float
    crossing_time_s: float


def _upload(
    client: Client, slug: str, number: int, result: sim.RolloutResult, folder: Path
) -> None:
    path = folder / f"{slug}-round{number}.parquet"
    write_parquet(to_table(result), path)
    client.upload(slug, number, path)


def _wait(client: Client, job: dict[str, Any]) -> dict[str, Any]:
    while job["status"] in ("queued", "running"):
        time.sleep(JOB_POLL_SECONDS)
        job = client.request("GET", f"/api/jobs/{job['id']}")
    if job["status"] != "done":
        raise RuntimeError(f"job {job['id']} {job['status']}: {job['message']}")
    return job


def answer_queue(client: Client, slug: str, kind: str) -> int:
    """The scripted expert labels every item it is offered, through the queue API."""
    answered = 0
    while True:
        item = client.request("POST", f"/api/loops/{slug}/queue/claim")["item"]
        if item is None:
            return answered
        features = np.asarray([item["state"]["features"]], dtype=np.float32)
        action = expert.actions(features, kind)[0]
        payload: int | list[float] = (
            int(action) if kind == "discrete" else np.asarray(action).tolist()
        )
        client.request(
            "POST",
            f"/api/loops/{slug}/queue/items/{item['item_id']}/labels",
            json={"submission_id": uuid.uuid4().hex, "answer": "action", "action": payload},
        )
        answered += 1


def _train(client: Client, slug: str, kind: str, seed: int) -> learner.Ensemble:
    rows = client.pull(slug, version="latest")
    assert isinstance(rows, dict)
    return learner.fit(rows["features"], rows["expert_action"], kind, np.random.default_rng(seed))


@dataclass(frozen=True)
class RunSize:
    """How much simulation a run does; tests use a smaller one than the demo."""

    demonstration_rollouts: int = DEMONSTRATION_ROLLOUTS
    rollouts_per_round: int = ROLLOUTS_PER_ROUND
    evaluation_rollouts: int = EVALUATION_ROLLOUTS
    with_scene: bool = True


def _evaluate(policy: Callable[..., Any], kind: str, seed: int, size: RunSize) -> dict[str, float]:
    return sim.rollout(policy, size.evaluation_rollouts, seed, kind=kind, with_scene=False).measures


def run(
    admin: Client,
    annotator: Client,
    *,
    kind: str,
    rounds: int,
    budget: int,
    selection: str,
    seed: int,
    slug: str | None = None,
    audit_fraction: float | None = None,
    size: RunSize = RunSize(),
    report: Callable[[RoundRow], None] = lambda _: None,
) -> list[RoundRow]:
    """Run round 0 and `rounds` DAgger rounds; return one row per round (round 0 = demonstrations only)."""
    scenario.check_kind(kind)
    if selection not in ("ranked", "uniform"):
        raise ValueError("selection must be 'ranked' or 'uniform'")
    spec = scenario.loop_spec(kind)
    spec["slug"] = slug or f"demo-{kind}-{selection}-s{seed}"
    # uniform selection: the whole budget is the seeded uniform audit sample
    if selection == "uniform":
        spec["settings"] = {"audit_fraction": 1.0}
    elif audit_fraction is not None:
        spec["settings"] = {"audit_fraction": audit_fraction}
    admin.create_loop(spec)
    slug = spec["slug"]
    eval_seed = seed + 10_000  # the same evaluation worlds for every round
    rows: list[RoundRow] = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        demos = sim.rollout(
            None,
            size.demonstration_rollouts,
            seed,
            kind=kind,
            key_prefix="demo",
            with_scene=size.with_scene,
        )
        _upload(admin, slug, 0, demos, folder)
        admin.create_snapshot(slug, up_to_round=0)
        policy = _train(admin, slug, kind, seed)
        measures = _evaluate(policy, kind, eval_seed, size)
        rows.append(
            RoundRow(
                0,
                0,
                0,
                0,
                None,
                None,
                None,
                False,
                None,
                measures["conflicts_per_100_crossings"],
                measures["mean_crossing_time_s"],
            )
        )
        report(rows[-1])
        labels_used = 0
        for number in range(1, rounds + 1):
            admin.open_round(slug, f"demo-learner-{number}")
            visited = sim.rollout(
                policy,
                size.rollouts_per_round,
                seed + 100 * number,
                kind=kind,
                takeover=True,
                key_prefix=f"r{number}",
                with_scene=size.with_scene,
            )
            _upload(admin, slug, number, visited, folder)
            started = admin.request(
                "POST",
                f"/api/loops/{slug}/rounds/{number}/ranking",
                json={"budget": budget, "seed": seed + number},
            )
            _wait(admin, started["job"])
            labels_used += answer_queue(annotator, slug, kind)
            round_report = admin.request("GET", f"/api/loops/{slug}/rounds/{number}/report")
            admin.create_snapshot(slug, up_to_round=number)
            policy = _train(admin, slug, kind, seed + number)
            measures = _evaluate(policy, kind, eval_seed, size)
            audit = round_report["audit"]["disagreement"]
            rows.append(
                RoundRow(
                    round=number,
                    labels_used=labels_used,
                    audit_count=audit["count"],
                    audit_n=audit["n"],
                    audit_disagreement=audit["rate"],
                    audit_lower=audit["lower"],
                    audit_upper=audit["upper"],
                    audit_quoted=audit["quoted"],
                    shift_mmd2=round_report["shift"]["mmd2"],
                    conflicts_per_100=measures["conflicts_per_100_crossings"],
                    crossing_time_s=measures["mean_crossing_time_s"],
                )
            )
            report(rows[-1])
    return rows


def format_row(row: RoundRow) -> str:
    """One table line; an audit rate from too few labels is shown, but marked."""
    if row.round == 0:
        audit = "-"
    elif row.audit_quoted and row.audit_disagreement is not None:
        audit = f"{row.audit_disagreement:.2f} [{row.audit_lower:.2f}, {row.audit_upper:.2f}] n={row.audit_n}"
    else:  # the service withholds a rate from too few labels; show the counts only
        audit = f"{row.audit_count}/{row.audit_n} (too few audit labels)"
    shift = "-" if row.shift_mmd2 is None else f"{row.shift_mmd2:.4f}"
    return (
        f"{row.round:>5} {row.labels_used:>7} {audit:>46} {shift:>9} "
        f"{row.conflicts_per_100:>10.2f} {row.crossing_time_s:>9.1f}"
    )


TABLE_HEADER = (
    f"{'round':>5} {'labels':>7} {'audit disagreement [95% Wilson]':>46} {'MMD^2':>9} "
    f"{'conf/100':>10} {'cross s':>9}"
)
