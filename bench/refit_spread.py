"""The label-efficiency benchmark's noise floor: how far the learner's score moves when the
same training set is fitted again with another seed.

bench/label_efficiency.py fits its bootstrap ensemble of small MLPs from scratch each round, and
a run "holds" 95% of the expert's score only if every later round stays there, so one unlucky
fit undoes a hold whatever the labels were. Here, per task and seed, the training set of the
same worlds (the two demonstrations, then ``--rounds`` rounds of ``--budget`` labels drawn
uniformly at random from the learner's visited states and answered by the scripted expert,
without the server, so not the benchmark's own fits) is fitted ``--refits`` times with different seeds, and each fit is scored on
the benchmark's evaluation episodes (random policy 0, expert 1). Printed per task, seed and
round: the scores of the refits, their range, and how many fall under 0.95.

    python bench/refit_spread.py --tasks acrobot,reacher --seeds 5 --rounds 4 --refits 6
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench import label_tasks as tasks  # noqa: E402

TARGET = 0.95


def spread(task: tasks.GymTask, seed: int, args: argparse.Namespace) -> dict[int, list[float]]:
    """Scores of ``args.refits`` fits of the training set after round 0 and the last round."""
    world = tasks.world(task, seed, args.eval_episodes)  # bench/label_efficiency.py's worlds
    demos = tasks.run_episodes(task, None, world.demo_seeds(args.demos), "demo")
    x = np.asarray(demos.columns["features"], np.float64)
    y = np.asarray(demos.columns["expert_action"])
    draw = np.random.default_rng(seed)
    policy = tasks.fit(task, x, y, np.random.default_rng(seed), args.learner)
    found: dict[int, list[float]] = {}
    for number in range(args.rounds + 1):
        if number:
            seeds = world.round_seeds(number, args.episodes)
            visited = np.asarray(
                tasks.run_episodes(task, policy, seeds, f"r{number}").columns["features"]
            )
            picked = visited[draw.choice(len(visited), size=args.budget, replace=False)]
            x = np.concatenate([x, picked])
            y = np.concatenate([y, task.expert(picked)])
            policy = tasks.fit(task, x, y, np.random.default_rng(seed * 100 + number), args.learner)
        if number in (0, args.rounds):
            refits = (
                tasks.fit(task, x, y, np.random.default_rng(10_000 + k), args.learner)
                for k in range(args.refits)
            )
            found[number] = [
                world.score(tasks.run_episodes(task, fit, world.eval_seeds, "eval").returns.mean())
                for fit in refits
            ]
    return found


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", default="acrobot,reacher")
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--rounds", type=int, default=4)
    parser.add_argument("--budget", type=int, default=20)
    parser.add_argument("--refits", type=int, default=6)
    tasks.add_world_sizes(parser)
    args = parser.parse_args()
    print(f"load average at start: {os.getloadavg()}")
    started = time.monotonic()
    for name in args.tasks.split(","):
        task = tasks.GYM_TASKS[name]
        under: dict[int, list[int]] = {}
        ranges: dict[int, list[float]] = {}
        for seed in range(args.seeds):
            for number, scores in spread(task, seed, args).items():
                low = sum(s < TARGET for s in scores)
                under.setdefault(number, []).append(low)
                ranges.setdefault(number, []).append(max(scores) - min(scores))
                print(
                    f"{name} seed={seed} round {number} ({number * args.budget} labels): "
                    f"{' '.join(f'{s:.2f}' for s in scores)}  range {max(scores) - min(scores):.2f}"
                    f"  under {TARGET}: {low} of {len(scores)}",
                    flush=True,
                )
        for number in under:
            print(
                f"{name} round {number}: median range {np.median(ranges[number]):.2f}; "
                f"fits under {TARGET}: {sum(under[number])} of {args.refits * args.seeds}; "
                f"seeds with at least one: {sum(u > 0 for u in under[number])} of {args.seeds}"
            )
    print(f"{time.monotonic() - started:.0f} s; load average at end: {os.getloadavg()}")


if __name__ == "__main__":
    main()
