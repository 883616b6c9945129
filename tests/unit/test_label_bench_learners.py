"""The label-efficiency bench's learner choice (bench/label_tasks.py, bench/label_efficiency.py):
both kinds of member fit and answer for discrete and continuous tasks, and saved runs of
different learners are never merged into one comparison."""

from __future__ import annotations

import json

import numpy as np
import pytest

from bench import label_efficiency as bench
from bench import label_tasks as tasks


@pytest.mark.parametrize("learner", tasks.LEARNERS)
@pytest.mark.parametrize("name", ["acrobot", "mountain-car"])
def test_each_learner_fits_an_ensemble_of_members(name, learner):
    task = tasks.GYM_TASKS[name]
    rng = np.random.default_rng(0)
    x = rng.normal(size=(60, len(task.feature_names)))
    y = task.expert(x)
    policy = tasks.fit(task, x, y, np.random.default_rng(1), learner)
    action, members = policy.act(x[:7])
    width = len(task.actions) if task.kind == "discrete" else 1
    assert members.shape == (7, tasks.N_MEMBERS, width)
    assert len(action) == 7


def test_an_unknown_learner_is_refused():
    task = tasks.GYM_TASKS["acrobot"]
    with pytest.raises(ValueError, match="unknown learner"):
        tasks.fit(task, np.zeros((4, 6)), np.zeros(4), np.random.default_rng(0), "forest")


def _saved(path, learner: str | None) -> None:
    run = bench.Run("acrobot", 20, 0, "ranked", labels=[0, 20], scores=[0.5, 0.9]).__dict__
    if learner is None:
        del run["learner"]  # a run saved before the learner was recorded
    else:
        run["learner"] = learner
    path.write_text(json.dumps({"args": {}, "runs": [run]}))


def test_runs_saved_before_the_choice_count_as_mlp_and_other_learners_are_not_merged(tmp_path):
    _saved(tmp_path / "old.json", None)
    _saved(tmp_path / "mlp.json", "mlp")
    runs, _ = bench.merge([tmp_path / "old.json", tmp_path / "mlp.json"])
    assert [r.learner for r in runs] == ["mlp"]
    _saved(tmp_path / "trees.json", "trees")
    trees = json.loads((tmp_path / "trees.json").read_text())
    trees["runs"][0]["selection"] = "uniform"
    (tmp_path / "trees.json").write_text(json.dumps(trees))
    with pytest.raises(SystemExit, match="differ in learner"):
        bench.merge([tmp_path / "old.json", tmp_path / "trees.json"])
