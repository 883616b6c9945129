"""The whole loop through the HTTP API on the invented demo: DAgger rounds improve the learner.

Three seeds, three rounds each, on one local server (SQLite). Checks, pooled over the seeds so
that no single seed's luck decides: after the last round the learner has fewer closed-loop
conflicts than the learner trained on demonstrations alone, and its disagreement with the expert
on the audit sample (uniform, so unbiased) is lower in the last round than in the first.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from expertloop.client import Client
from expertloop.config import Settings
from expertloop.demo import loop_run
from expertloop.demo.local_server import local_server
from expertloop.demo.plot import write_plot

SEEDS = (0, 1, 2)
SMALL = loop_run.RunSize(
    demonstration_rollouts=4, rollouts_per_round=6, evaluation_rollouts=30, with_scene=False
)


@pytest.mark.slow
def test_dagger_rounds_improve_the_learner(tmp_path: Path) -> None:
    settings = Settings(data_dir=tmp_path / "data", job_mode="thread")
    runs = []
    with (
        local_server(settings) as server,
        Client(server.url, server.admin_token) as admin,
        Client(server.url, server.annotator_token) as annotator,
    ):
        for seed in SEEDS:
            runs.append(
                loop_run.run(
                    admin,
                    annotator,
                    kind="discrete",
                    rounds=3,
                    budget=40,
                    selection="ranked",
                    seed=seed,
                    audit_fraction=0.5,  # enough audit labels per round to compare rounds
                    size=SMALL,
                )
            )
    for rows in runs:
        assert [r.round for r in rows] == [0, 1, 2, 3]
        assert rows[-1].labels_used == 3 * 40
        assert all(r.audit_n > 0 for r in rows[1:])
    behaviour_cloning = sum(rows[0].conflicts_per_100 for rows in runs)
    after_last_round = sum(rows[-1].conflicts_per_100 for rows in runs)
    print(
        "conflicts/100 per seed:", [[round(r.conflicts_per_100, 1) for r in rows] for rows in runs]
    )
    assert after_last_round < behaviour_cloning, (behaviour_cloning, after_last_round)
    first = sum(rows[1].audit_count for rows in runs) / sum(rows[1].audit_n for rows in runs)
    last = sum(rows[-1].audit_count for rows in runs) / sum(rows[-1].audit_n for rows in runs)
    print("pooled audit disagreement, first and last round:", first, last)
    assert last < first, (first, last)
    plot = tmp_path / "plot.svg"
    write_plot(runs[0], plot, title="test")
    assert plot.read_text().count("<svg") == 3
