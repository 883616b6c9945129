"""Label efficiency: ranked against uniform selection, whole DAgger rounds through the HTTP API.

A server runs in a subprocess on a fresh SQLite store. For each task, budget B and seed, two
loops run side by side, one ranked (the loop's defaults) and one uniform (``audit_fraction``
1.0: the whole budget drawn uniformly at random). Each round: roll out the current learner,
upload, rank, let the scripted expert answer the queue through the queue API, snapshot, pull,
retrain a bootstrap ensemble, and score the new learner on fixed evaluation episodes.

Tasks: ``demo`` (the invented tow-tractor scenario, discrete; score = 1 - conflicts per
crossing, the expert scores 1), and gymnasium tasks from bench/label_tasks.py (``acrobot``,
``taxi``, ``mountain-car``, ``reacher``; score normalised so that a random policy is 0 and the
expert 1). Reported per
task and budget: labels to first reach and to hold (every later round too) 95% of the expert's
score; a seed that never holds counts as above the cap (rounds x B). Medians, paired wins
(ranked holds with fewer labels than uniform on the same seed) and the ratio of medians
(uniform / ranked). Needs the ``bench`` extra (gymnasium, with MuJoCo for ``reacher``).

    python bench/label_efficiency.py --tasks demo,acrobot,mountain-car --budgets 20,50 \\
        --seeds 10 --rounds 8
"""

from __future__ import annotations

import argparse
import json
import math
import os
import statistics
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench import label_tasks as tasks  # noqa: E402
from expertloop.client import Client  # noqa: E402
from expertloop.demo import loop_run  # noqa: E402
from expertloop.migrations_state import upgrade  # noqa: E402
from tests.serving import server_process  # noqa: E402

TARGET = 0.95
SELECTIONS = ("ranked", "uniform")
RESULTS = Path(__file__).resolve().parent / "results"


@dataclass
class Run:
    task: str
    budget: int
    seed: int
    selection: str
    # what the ensemble's members are (bench/label_tasks.py LEARNERS), or "demo" for the demo
    # task, which trains the demo's own learner
    learner: str = "mlp"
    labels: list[int] = field(default_factory=list)
    scores: list[float] = field(default_factory=list)
    trace: list[dict[str, Any]] = field(default_factory=list)

    def reach(self) -> float:
        """Labels when the score first reached the target (inf: never)."""
        return next(
            (n for n, s in zip(self.labels, self.scores, strict=True) if s >= TARGET), math.inf
        )

    def hold(self) -> float:
        """Labels from which the score stayed at or above the target to the last round."""
        held = math.inf
        for n, s in zip(reversed(self.labels), reversed(self.scores), strict=True):
            if s < TARGET:
                break
            held = n
        return held


def _tokens(database_url: str) -> tuple[str, str]:
    from expertloop.auth import service as auth_service
    from expertloop.db import make_engine, make_session_factory

    upgrade(database_url)
    engine = make_engine(database_url)
    with make_session_factory(engine).begin() as session:
        admin = auth_service.create_user(session, name="bench-admin", roles=["admin"])
        expert = auth_service.create_user(session, name="scripted-expert", roles=["annotator"])
        found = (
            auth_service.issue_token(session, user=admin),
            auth_service.issue_token(session, user=expert),
        )
    engine.dispose()
    return found


def _upload(client: Client, slug: str, number: int, columns: dict[str, Any], folder: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = folder / f"{slug}-{number}.parquet"
    pq.write_table(pa.table(columns), path)
    client.upload(slug, number, path)


def _answer(client: Client, slug: str, task: tasks.GymTask, seen: list[Any]) -> int:
    """Answer the queue as the scripted expert; append each labelled state's features."""
    answered = 0
    while True:
        item = client.request("POST", f"/api/loops/{slug}/queue/claim")["item"]
        if item is None:
            return answered
        seen.append(item["state"]["features"])
        action = task.expert(np.asarray([item["state"]["features"]], np.float64))[0]
        payload: Any = int(action) if task.kind == "discrete" else [float(v) for v in action]
        client.request(
            "POST",
            f"/api/loops/{slug}/queue/items/{item['item_id']}/labels",
            json={"submission_id": uuid.uuid4().hex, "answer": "action", "action": payload},
        )
        answered += 1


def _train(
    client: Client, slug: str, task: tasks.GymTask, seed: int, learner: str
) -> tasks.Ensemble:
    rows = client.pull(slug, version="latest")
    assert isinstance(rows, dict)
    return tasks.fit(
        task, rows["features"], rows["expert_action"], np.random.default_rng(seed), learner
    )


def run_gym(
    admin: Client, annotator: Client, run: Run, args: argparse.Namespace, folder: Path
) -> Run:
    task = tasks.GYM_TASKS[run.task]
    slug = f"{run.task}-b{run.budget}-{run.selection}-s{run.seed}"
    settings: dict[str, Any] = {"audit_fraction": 1.0} if run.selection == "uniform" else {}
    if args.gap_steps is not None:
        settings["min_gap_steps"] = args.gap_steps
    if run.selection == "ranked":
        settings.update(args.setting)
    admin.create_loop(task.spec(slug, settings))
    world = tasks.world(task, run.seed, args.eval_episodes)
    demos = tasks.run_episodes(task, None, world.demo_seeds(args.demos), "demo")
    _upload(admin, slug, 0, demos.columns, folder)
    admin.create_snapshot(slug, up_to_round=0)
    policy = _train(admin, slug, task, run.seed, run.learner)
    labels = 0
    for number in range(args.rounds + 1):
        if number:
            admin.open_round(slug, f"learner-{number}")
            seeds = world.round_seeds(number, args.episodes)
            visited = tasks.run_episodes(task, policy, seeds, f"r{number}")
            _upload(admin, slug, number, visited.columns, folder)
            started = admin.request(
                "POST",
                f"/api/loops/{slug}/rounds/{number}/ranking",
                json={"budget": run.budget, "seed": run.seed * 100 + number},
            )
            job = loop_run._wait(admin, started["job"])
            seen: list[Any] = []
            labels += _answer(annotator, slug, task, seen)
            admin.create_snapshot(slug, up_to_round=number)
            if args.trace:
                record = admin.request(
                    "GET", f"/api/loops/{slug}/rounds/{number}/selection?limit=1"
                )["params"]["self_tuning"]
                run.trace.append(_trace(task, policy, visited, np.asarray(seen), job, record))
            policy = _train(admin, slug, task, run.seed * 100 + number, run.learner)
        evaluated = tasks.run_episodes(task, policy, world.eval_seeds, "eval")
        run.labels.append(labels)
        run.scores.append(world.score(evaluated.returns.mean()))
        if args.trace and number:
            run.trace[-1]["eval_error"] = _error_rate(task, policy, evaluated)
    return run


def _error_rate(task: tasks.GymTask, policy: tasks.Ensemble, episodes: tasks.Episodes) -> float:
    """Share of the learner's steps where the expert would have acted otherwise."""
    features = np.asarray(episodes.columns["features"], np.float64)
    return float(_disagrees(task, policy.act(features)[0], features).mean())


def _disagrees(task: tasks.GymTask, learner: Any, features: Any) -> Any:
    expert = task.expert(features)
    if task.kind == "discrete":
        return np.asarray(learner) != expert
    # continuous: the service's default tolerance, 10% of the action range
    tolerance = 0.1 * (task.high - task.low)
    return np.abs(np.asarray(learner).reshape(expert.shape) - expert).max(axis=1) > tolerance


def _action_gap(task: tasks.GymTask, learner: Any, features: Any) -> float | None:
    """Mean over states of the largest gap between the learner's and the expert's action, as
    a share of the action's range (continuous tasks; None for discrete): unlike the
    disagreement rate it does not depend on a tolerance."""
    if task.kind == "discrete" or len(features) == 0:
        return None
    expert = task.expert(features)
    gap = np.abs(np.asarray(learner).reshape(expert.shape) - expert) / (task.high - task.low)
    return float(gap.max(axis=1).mean())


def _trace(
    task: tasks.GymTask,
    policy: tasks.Ensemble,
    visited: tasks.Episodes,
    labelled: Any,
    job: dict[str, Any],
    tuning: dict[str, Any],
) -> dict[str, Any]:
    """What a round's selection picked, against the round's candidates (--trace): the
    learner's error rate on each, how spread out the picks are, and what ranked them."""
    features = np.asarray(visited.columns["features"], np.float64)
    mean, scale = features.mean(axis=0), features.std(axis=0)
    scale[scale == 0] = 1.0
    picks = (labelled - mean) / scale
    gaps = np.sqrt(((picks[:, None, :] - picks[None, :, :]) ** 2).sum(axis=2))
    np.fill_diagonal(gaps, np.inf)
    counts = (
        np.bincount(task.expert(labelled), minlength=len(task.actions)).tolist()
        if task.kind == "discrete"
        else None
    )
    result = job["result"]
    return {
        "candidates": len(features),
        "candidate_error": _error_rate(task, policy, visited),
        "pick_error": float(_disagrees(task, policy.act(labelled)[0], labelled).mean()),
        "candidate_gap": _action_gap(task, policy.act(features)[0], features),
        "pick_gap": _action_gap(task, policy.act(labelled)[0], labelled),
        "pick_nearest_median": float(np.median(gaps.min(axis=1))),
        "expert_actions": counts,
        "score": result["methods"]["score"],
        "self_tuning": result["self_tuning"]["used"],
        "tuning_effective_n": tuning.get("model", {}).get("effective_n"),
    }


def run_demo(admin: Client, annotator: Client, run: Run, args: argparse.Namespace) -> Run:
    rows = loop_run.run(
        admin,
        annotator,
        kind="discrete",
        rounds=args.rounds,
        budget=run.budget,
        selection=run.selection,
        seed=run.seed,
        slug=f"demo-b{run.budget}-{run.selection}-s{run.seed}",
        size=loop_run.RunSize(evaluation_rollouts=args.eval_episodes * 3, with_scene=False),
    )
    for row in rows:
        run.labels.append(row.labels_used)
        run.scores.append(1.0 - row.conflicts_per_100 / 100.0)
    return run


def _median(values: list[float]) -> float:
    return statistics.median(values) if values else math.nan


def _text(value: float, cap: int) -> str:
    return f">{cap}" if math.isinf(value) else f"{value:g}"


def summarise(runs: list[Run]) -> list[dict[str, Any]]:
    """One line per task and budget: medians, paired wins and the ratio of medians. The cap
    (labels a seed that never held counts above) is the budget times the most rounds any run
    of the task and budget had: merged runs may differ in rounds from task to task."""
    lines = []
    for task in dict.fromkeys(r.task for r in runs):
        for budget in dict.fromkeys(r.budget for r in runs if r.task == task):
            rounds = max(len(r.labels) - 1 for r in runs if (r.task, r.budget) == (task, budget))
            pick = {
                s: sorted(
                    (r for r in runs if (r.task, r.budget, r.selection) == (task, budget, s)),
                    key=lambda r: r.seed,
                )
                for s in SELECTIONS
            }
            ranked, uniform = pick["ranked"], pick["uniform"]
            paired = [(a, b) for a in ranked for b in uniform if a.seed == b.seed]
            hold_r = _median([r.hold() for r in ranked])
            hold_u = _median([r.hold() for r in uniform])
            lines.append(
                {
                    "task": task,
                    "budget": budget,
                    "learner": (ranked or uniform)[0].learner,
                    "seeds": len(paired),
                    "cap": rounds * budget,
                    "reach_ranked": _median([r.reach() for r in ranked]),
                    "reach_uniform": _median([r.reach() for r in uniform]),
                    "hold_ranked": hold_r,
                    "hold_uniform": hold_u,
                    "held_ranked": sum(not math.isinf(r.hold()) for r in ranked),
                    "held_uniform": sum(not math.isinf(r.hold()) for r in uniform),
                    "wins_ranked": sum(a.hold() < b.hold() for a, b in paired),
                    "wins_uniform": sum(b.hold() < a.hold() for a, b in paired),
                    "ratio": hold_u / hold_r if hold_r and not math.isinf(hold_r) else math.nan,
                }
            )
    return lines


def print_summary(lines: list[dict[str, Any]]) -> None:
    print(
        f"{'task':<13}{'B':>4}{'learner':>8}{'seeds':>6}  {'reach r/u':>13}  {'hold r/u':>13}  "
        f"{'held r/u':>9}  {'wins r/u':>9}  {'u/r':>6}"
    )
    for x in lines:
        cap = x["cap"]
        reach = f"{_text(x['reach_ranked'], cap)}/{_text(x['reach_uniform'], cap)}"
        hold = f"{_text(x['hold_ranked'], cap)}/{_text(x['hold_uniform'], cap)}"
        ratio = "-" if math.isnan(x["ratio"]) else f"{x['ratio']:.2f}"
        if math.isinf(x["hold_uniform"]) and not math.isinf(x["hold_ranked"]):
            ratio = f">{cap / x['hold_ranked']:.2f}" if x["hold_ranked"] else ratio
        print(
            f"{x['task']:<13}{x['budget']:>4}{x['learner']:>8}{x['seeds']:>6}  {reach:>13}  {hold:>13}  "
            f"{x['held_ranked']:>4}/{x['held_uniform']:<4}  "
            f"{x['wins_ranked']:>4}/{x['wins_uniform']:<4}  {ratio:>6}"
        )


def print_trace(runs: list[Run]) -> None:
    """What the selections picked (runs with --trace), by selection, over groups of rounds:
    the learner's error on the round's candidates and on the picks, the median distance from a
    pick to the nearest other pick (features standardised over the round's candidates), the
    share of the rarer expert action among the picks (discrete tasks), the effective sample
    size of the self-tuned model where one ranked, and on continuous tasks the mean largest gap
    between the learner's and the expert's action (share of the range) on the candidates and
    on the picks."""
    traced = [r for r in runs if r.trace]
    if not traced:
        return
    groups = {
        "all rounds": lambda t: True,
        "learner failing (error > 0.25)": lambda t: t["candidate_error"] > 0.25,
        "ranked by the self-tuned model": lambda t: t["self_tuning"],
    }
    print(
        f"\n{'task':<13}{'B':>4} {'selection':<8} {'rounds':<31}{'n':>4}  {'err cand':>8}  "
        f"{'err picks':>9}  {'nearest':>7}  {'rarer':>5}  {'eff n':>5}  {'gap cand':>8}  "
        f"{'gap picks':>9}"
    )
    for task in dict.fromkeys(r.task for r in traced):
        for budget in dict.fromkeys(r.budget for r in traced if r.task == task):
            for selection in SELECTIONS:
                rounds = [
                    t
                    for r in traced
                    if (r.task, r.budget, r.selection) == (task, budget, selection)
                    for t in r.trace
                ]
                for name, keep in groups.items():
                    chosen = [t for t in rounds if keep(t)]
                    if not chosen:
                        continue
                    mixes = [t["expert_actions"] for t in chosen if t["expert_actions"]]
                    rarer = (
                        f"{np.mean([sorted(m)[-2] / sum(m) for m in mixes]):.2f}" if mixes else "-"
                    )
                    eff = [t["tuning_effective_n"] for t in chosen if t.get("tuning_effective_n")]
                    gaps = [
                        (t["candidate_gap"], t["pick_gap"])
                        for t in chosen
                        if t.get("candidate_gap") is not None
                    ]
                    gap_cand, gap_picks = (
                        (
                            f"{np.mean([g[0] for g in gaps]):.3f}",
                            f"{np.mean([g[1] for g in gaps]):.3f}",
                        )
                        if gaps
                        else ("-", "-")
                    )
                    print(
                        f"{task:<13}{budget:>4} {selection:<8} {name:<31}{len(chosen):>4}  "
                        f"{np.mean([t['candidate_error'] for t in chosen]):>8.3f}  "
                        f"{np.mean([t['pick_error'] for t in chosen]):>9.3f}  "
                        f"{np.median([t['pick_nearest_median'] for t in chosen]):>7.2f}  "
                        f"{rarer:>5}  "
                        f"{(f'{np.median(eff):.1f}' if eff and selection == 'ranked' else '-'):>5}  "
                        f"{gap_cand:>8}  {gap_picks:>9}"
                    )


def plot(runs: list[Run], path: Path) -> None:
    """Median score (bars: lowest to highest seed) by round, ranked and uniform, per task and
    budget, stacked in one SVG drawn with the service's own chart code."""
    from expertloop.reports.charts import Point, Series, point_chart

    charts = []
    for task in dict.fromkeys(r.task for r in runs):
        for budget in dict.fromkeys(r.budget for r in runs if r.task == task):
            series = []
            for selection, marker in zip(SELECTIONS, ("circle", "square"), strict=True):
                chosen = [
                    r for r in runs if (r.task, r.budget, r.selection) == (task, budget, selection)
                ]
                if not chosen:
                    continue
                scores = np.array([r.scores for r in chosen])
                points = [
                    Point(k, float(np.median(col)), float(col.min()), float(col.max()))
                    for k, col in enumerate(scores.T)
                ]
                series.append(Series(selection, points, marker=marker))  # type: ignore[arg-type]
            charts.append(
                point_chart(
                    series,
                    chart_id=f"{task}-{budget}",
                    title=f"{task}, B = {budget} labels a round: score (1 = expert)",
                    description="Median score of the learner after each round across seeds.",
                    y_label="score",
                    x_label=f"round (labels = round x {budget})",
                )
            )
    height = 280 * len(charts)
    body = "".join(f'<g transform="translate(0, {280 * i})">{c}</g>' for i, c in enumerate(charts))
    path.write_text(
        f'<svg xmlns="http://www.w3.org/2000/svg" width="560" height="{height}">{body}</svg>\n'
    )


def _recorded(value: object) -> str:
    """An argument as the results record it: a path inside the repository relative to it, so a
    saved run names no folder of the machine it ran on."""
    if isinstance(value, Path):
        try:
            return str(value.resolve().relative_to(RESULTS.parent.parent))
        except ValueError:
            pass
    return str(value)


def save(runs: list[Run], args: argparse.Namespace) -> None:
    """Write every finished run and the summary so far (an interrupted benchmark keeps them)."""
    args.out.parent.mkdir(parents=True, exist_ok=True)
    _write(args.out, {k: _recorded(v) for k, v in vars(args).items()}, runs)


def _write(out: Path, recorded: dict[str, Any], runs: list[Run]) -> None:
    lines = summarise(runs)
    out.with_suffix(".json").write_text(
        json.dumps(
            {
                "args": recorded,
                # never held or reached: null (JSON has no infinity)
                "summary": [
                    {
                        k: None if isinstance(v, float) and not math.isfinite(v) else v
                        for k, v in line.items()
                    }
                    for line in lines
                ],
                "runs": [r.__dict__ for r in runs],
            },
            indent=1,
        )
    )


def _outside(value: str) -> str:
    """A recorded path outside the repository by its name only: no folder of the machine."""
    return Path(value).name if Path(value).is_absolute() else value


def merge(paths: list[Path]) -> tuple[list[Run], dict[str, Any]]:
    """The runs saved in several files, one per task, budget, seed and selection (a run in a
    later file replaces the same run of an earlier one, and is reported), and what each file
    recorded of its arguments, under ``merged_from``."""
    found: dict[tuple[str, int, int, str], Run] = {}
    sources = []
    for path in paths:
        saved = json.loads(path.read_text())
        named = _recorded(path.resolve())
        sources.append(
            {
                "file": _outside(named),
                **{k: _outside(v) if k == "out" else v for k, v in saved["args"].items()},
            }
        )
        for record in saved["runs"]:
            # runs saved before the learner was a choice: the demo's own, else "mlp"
            record.setdefault("learner", "demo" if record["task"] == "demo" else "mlp")
            run = Run(**record)
            key = (run.task, run.budget, run.seed, run.selection)
            if key in found:
                print(f"{path.name} replaces the run {key}")
            found[key] = run
    rounds: dict[tuple[str, int], set[int]] = {}
    for run in found.values():
        rounds.setdefault((run.task, run.budget), set()).add(len(run.labels) - 1)
    mixed = {key: sorted(n) for key, n in rounds.items() if len(n) > 1}
    if mixed:
        # the medians, the cap and the plot compare runs round by round
        raise SystemExit(f"runs of one task and budget differ in rounds: {mixed}")
    learners: dict[tuple[str, int], set[str]] = {}
    for run in found.values():
        learners.setdefault((run.task, run.budget), set()).add(run.learner)
    mixed_learners = {key: sorted(n) for key, n in learners.items() if len(n) > 1}
    if mixed_learners:
        # ranked and uniform are compared on the same learner
        raise SystemExit(f"runs of one task and budget differ in learner: {mixed_learners}")
    return list(found.values()), {"merged_from": sources}


def _setting(text: str) -> tuple[str, Any]:
    name, _, value = text.partition("=")
    return name, json.loads(value)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", default="demo,acrobot,mountain-car")
    parser.add_argument("--budgets", default="20,50")
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--rounds", type=int, default=8)
    tasks.add_world_sizes(parser)
    parser.add_argument(
        "--selections",
        default=",".join(SELECTIONS),
        choices=[",".join(SELECTIONS), *SELECTIONS],
        help="run both (default) or one; uniform does not depend on --gap-steps or --setting",
    )
    parser.add_argument("--gap-steps", type=int, default=None, help="override min_gap_steps")
    parser.add_argument(
        "--setting",
        type=_setting,
        action="append",
        default=[],
        help="NAME=JSON: a loop setting for the ranked loops (gym tasks), e.g. self_tuning=false",
    )
    parser.add_argument(
        "--out", type=Path, default=None, help="default: bench/results/label_efficiency"
    )
    parser.add_argument(
        "--trace",
        action="store_true",
        help="record per round what the selection picked (gym tasks): the learner's error on "
        "the picks and on all candidates, the picks' spread and label mix, in the saved runs",
    )
    parser.add_argument(
        "--from-json",
        type=Path,
        nargs="+",
        default=None,
        help="summarise and plot the runs saved in these files (e.g. of an interrupted run): "
        "one file is plotted beside itself; several are merged and written to --out, which "
        "must then be given",
    )
    args = parser.parse_args()
    if args.from_json is not None and len(args.from_json) > 1 and args.out is None:
        parser.error("merging several --from-json files needs --out")
    args.out = args.out or RESULTS / "label_efficiency"
    if args.from_json is not None:
        runs, recorded = merge(args.from_json)
        print_summary(summarise(runs))
        print_trace(runs)
        if len(args.from_json) == 1:
            plot(runs, args.from_json[0].with_suffix(".svg"))
            return
        args.out.parent.mkdir(parents=True, exist_ok=True)
        plot(runs, args.out.with_suffix(".svg"))
        _write(args.out, recorded, runs)
        print(f"wrote {args.out.with_suffix('.svg')} and .json")
        return
    budgets = [int(b) for b in args.budgets.split(",")]
    names = args.tasks.split(",")
    unknown = set(names) - {"demo", *tasks.GYM_TASKS}
    if unknown:
        parser.error(f"unknown tasks {sorted(unknown)}")
    print(f"load average at start: {os.getloadavg()}")
    started = time.monotonic()
    runs: list[Run] = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        url = f"sqlite:///{folder / 'bench.db'}"
        admin_token, expert_token = _tokens(url)
        with server_process(url, folder / "data", log_path=folder / "server.log") as server:
            admin, annotator = Client(server.url, admin_token), Client(server.url, expert_token)
            for name in names:
                for budget in budgets:
                    for seed in range(args.first_seed, args.first_seed + args.seeds):
                        for selection in args.selections.split(","):
                            learner = "demo" if name == "demo" else args.learner
                            run = Run(name, budget, seed, selection, learner)
                            if name == "demo":
                                run_demo(admin, annotator, run, args)
                            else:
                                run_gym(admin, annotator, run, args, folder)
                            runs.append(run)
                            scores = " ".join(f"{s:.2f}" for s in run.scores)
                            print(
                                f"{name} B={budget} seed={seed} {selection:>7}: hold "
                                f"{_text(run.hold(), args.rounds * budget)} scores {scores}",
                                flush=True,
                            )
                            save(runs, args)
    lines = summarise(runs)
    print()
    print_summary(lines)
    print_trace(runs)
    print(f"\n{time.monotonic() - started:.0f} s; load average at end: {os.getloadavg()}")
    plot(runs, args.out.with_suffix(".svg"))
    save(runs, args)
    print(f"wrote {args.out.with_suffix('.svg')} and .json")


if __name__ == "__main__":
    main()
