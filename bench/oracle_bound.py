"""How many labels the label-efficiency benchmark's learner needs when the picks are the
learner's actual errors: an upper bound for any ranking the sampler could compute.

bench/label_efficiency.py compares the sampler's ranked selection with uniform selection. Here
the same DAgger rounds run without the server (that benchmark's worlds, episode seeds and
fitting seeds; not its fits, since there the states pass through the store as float32 and come
back in its order), and each round's B labels are picked either uniformly at random or by an
oracle that knows the expert's answers: the states where the learner's action is furthest from
the expert's (discrete: where they differ, in random order, then the rest; continuous: the
largest gap in any dimension as a share of its range first). No sampler can pick better by
that measure, so the oracle's ratio of median labels to hold 95% of the expert's score (uniform
/ oracle) bounds what ranking alone can reach on these tasks with this learner.

    python bench/oracle_bound.py --tasks acrobot,reacher --budgets 20 --seeds 5
"""

from __future__ import annotations

import argparse
import math
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench import label_tasks as tasks  # noqa: E402

TARGET = 0.95
PICKS = ("oracle", "uniform")


def gap(task: tasks.GymTask, learner: np.ndarray, features: np.ndarray) -> np.ndarray:
    """How far the learner's action is from the expert's at each state (0 where they agree)."""
    expert = task.expert(features)
    if task.kind == "discrete":
        return (np.asarray(learner) != expert).astype(np.float64)
    off = np.abs(np.asarray(learner).reshape(expert.shape) - expert) / (task.high - task.low)
    return np.asarray(off.max(axis=1), dtype=np.float64)


def run(task: tasks.GymTask, seed: int, budget: int, pick: str, args: argparse.Namespace) -> float:
    """Labels from which the score stays at or above the target (inf: never within the rounds)."""
    world = tasks.world(task, seed, args.eval_episodes)  # bench/label_efficiency.py's worlds
    demos = tasks.run_episodes(task, None, world.demo_seeds(args.demos), "demo")
    x = np.asarray(demos.columns["features"], np.float64)
    y = np.asarray(demos.columns["expert_action"])
    policy = tasks.fit(task, x, y, np.random.default_rng(seed), args.learner)
    draw = np.random.default_rng(seed)
    scores = []
    for number in range(args.rounds + 1):
        if number:
            seeds = world.round_seeds(number, args.episodes)
            visited = np.asarray(
                tasks.run_episodes(task, policy, seeds, f"r{number}").columns["features"],
                np.float64,
            )
            shuffled = draw.permutation(len(visited))
            if pick == "oracle":
                # largest gap first; among equal gaps (a discrete task's disagreements) the
                # random order of the shuffle
                off = gap(task, policy.act(visited[shuffled])[0], visited[shuffled])
                shuffled = shuffled[np.argsort(-off, kind="stable")]
            picked = visited[shuffled[:budget]]
            x = np.concatenate([x, picked])
            y = np.concatenate([y, task.expert(picked)])
            policy = tasks.fit(task, x, y, np.random.default_rng(seed * 100 + number), args.learner)
        returns = tasks.run_episodes(task, policy, world.eval_seeds, "eval").returns.mean()
        scores.append(world.score(returns))
    held = math.inf
    for number in range(args.rounds, -1, -1):
        if scores[number] < TARGET:
            break
        held = number * budget
    print(
        f"{task.name} B={budget} seed={seed} {pick:>7}: hold "
        f"{'>' + str(args.rounds * budget) if math.isinf(held) else f'{held:g}'} "
        f"scores {' '.join(f'{s:.2f}' for s in scores)}",
        flush=True,
    )
    return held


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", default="acrobot,reacher")
    parser.add_argument("--budgets", default="20")
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--rounds", type=int, default=8)
    tasks.add_world_sizes(parser)
    args = parser.parse_args()
    print(f"load average at start: {os.getloadavg()}")
    started = time.monotonic()
    lines = []
    for name in args.tasks.split(","):
        task = tasks.GYM_TASKS[name]
        for budget in (int(b) for b in args.budgets.split(",")):
            seeds = range(args.first_seed, args.first_seed + args.seeds)
            held = {p: [run(task, s, budget, p, args) for s in seeds] for p in PICKS}
            med = {p: statistics.median(held[p]) for p in PICKS}
            ratio = med["uniform"] / med["oracle"] if 0 < med["oracle"] < math.inf else math.nan
            wins = sum(a < b for a, b in zip(held["oracle"], held["uniform"], strict=True))
            losses = sum(a > b for a, b in zip(held["oracle"], held["uniform"], strict=True))
            lines.append(
                f"{name} B={budget}: median labels to hold, oracle {med['oracle']:g}, uniform "
                f"{med['uniform']:g} (inf: never within {args.rounds * budget}); uniform / "
                f"oracle {ratio:.2f}; paired wins oracle {wins}, uniform {losses}"
            )
    print("\n".join(lines))
    print(f"{time.monotonic() - started:.0f} s; load average at end: {os.getloadavg()}")


if __name__ == "__main__":
    main()
