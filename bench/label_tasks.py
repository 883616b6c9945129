"""Control tasks for bench/label_efficiency.py: gymnasium environments, scripted experts and a
bootstrap-ensemble learner (scikit-learn MLPs, or extra-trees forests with --learner trees;
CPU only).

Experts are written from the tasks' published dynamics (gymnasium's documentation of each
environment), not tuned against the learner:

- acrobot (Acrobot-v1, discrete torque -1/0/+1 on the second joint): apply the torque with the
  sign of the second joint's angular velocity. The power the motor puts in, torque x angular
  velocity, is then never negative, so the system's energy grows until the tip swings above the
  line (energy pumping, common practice for underactuated swing-up).
- mountain-car (MountainCarContinuous-v0, force in [-1, 1]): push with full force in the
  direction the car moves, which adds the most energy per step, so the car rocks up to the flag
  (common practice).
- taxi (Taxi-v4, six discrete actions): the optimal policy by value iteration (discount 0.99)
  over the environment's own published transition table ``env.unwrapped.P``. The learner sees
  the state one-hot encoded (taxi row, column, passenger location, destination: 19 features).
- reacher (MuJoCo Reacher-v5, two torques in [-1, 1] on a planar two-link arm): an
  inverse-kinematics PD controller written from the arm's published kinematics (gymnasium's
  ``reacher.xml``: links of 0.1 m and, to the fingertip, 0.11 m): the closed-form two-link
  inverse kinematics (law of cosines) gives the joint angles that put the fingertip on the
  target, and the torques are ``REACHER_KP`` times the angle error minus ``REACHER_KD`` times
  the joint velocities, clipped to the range (joint-space PD control, as in Craig,
  *Introduction to Robotics*). The gains are the best of a grid on the expert's own return (kp
  0.5, 1, 2, 5, 10 by kd 0.02, 0.05, 0.1, 0.2, on the evaluation episodes of seed 0: kp 0.5,
  kd 0.1 returns -3.9, its fingertip ends a median 0.4 mm from the target), never chosen on a
  learner. A Jacobian-transpose controller was tried first and dropped: from the arm's
  straight start (a singular pose, where no torque moves the fingertip towards the shoulder)
  it stalled about 0.1 m from the target.

acrobot and mountain-car have experts a learner copies from one or two features (easy); taxi
needs a different action in many of its 500 states (harder); reacher's expert is a nonlinear
function of eight of the ten features (angles, target, velocities; wrapped angles, a switch
between the two elbow solutions, saturation) with two continuous outputs, which two
demonstrations of 50 steps do not pin down.

Scores are normalised per task: (mean return - random policy's) / (expert's - random policy's),
each measured on the same evaluation episodes, so 1.0 is the expert and 0.95 the target. On
reacher the random policy's torques cost it 0.67 a step in control penalty (about -33 of its
-43), so an arm left still (zero torque) scores 0.77 to 0.87 by seed: the target asks for a
return a fifth to two fifths of the way from the expert to the still arm (on seed 0's evaluation
episodes within 2 of the expert's -3.9, the still arm at -9.8).
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.ensemble import ExtraTreesClassifier, ExtraTreesRegressor
from sklearn.exceptions import ConvergenceWarning
from sklearn.neural_network import MLPClassifier, MLPRegressor

N_MEMBERS = 5
# reacher's expert (module docstring): link lengths from gymnasium's reacher.xml, gains chosen
# on the expert's own return
REACHER_LINKS = (0.1, 0.11)
REACHER_KP = 0.5
REACHER_KD = 0.1
HIDDEN_UNITS = 32
MAX_ITER = 200
FOREST_TREES = 20
LEARNERS = ("mlp", "trees")


@dataclass(frozen=True)
class GymTask:
    name: str
    env_id: str
    kind: str  # "discrete" or "continuous"
    feature_names: tuple[str, ...]
    actions: tuple[str, ...] = ()
    low: float = -1.0
    high: float = 1.0
    dimensions: tuple[str, ...] = ("force",)  # continuous tasks: one name per action dimension
    step_s: float = 0.1
    max_steps: int = 500

    def featurize(self, observations: NDArray[Any]) -> NDArray[np.float64]:
        """Features of raw observations: taxi's state index one-hot encoded, others as given."""
        obs = np.asarray(observations)
        if self.name != "taxi":
            return obs.astype(np.float64).reshape(len(obs), -1)
        dest = obs % 4
        passenger = (obs // 4) % 5
        col = (obs // 20) % 5
        row = obs // 100
        out = np.zeros((len(obs), 19))
        for offset, value in ((0, row), (5, col), (10, passenger), (15, dest)):
            out[np.arange(len(obs)), offset + value] = 1.0
        return out

    def expert(self, features: NDArray[Any]) -> NDArray[Any]:
        """The scripted expert's actions for features (n, d)."""
        x = np.asarray(features, np.float64)
        if self.name == "acrobot":
            return np.where(x[:, 5] > 0, 2, 0).astype(np.int64)
        if self.name == "mountain-car":
            return np.where(x[:, 1] >= 0, 1.0, -1.0).reshape(-1, 1)
        if self.name == "reacher":
            return reacher_expert(x)
        if self.name == "taxi":
            row, col = x[:, 0:5].argmax(1), x[:, 5:10].argmax(1)
            passenger, dest = x[:, 10:15].argmax(1), x[:, 15:19].argmax(1)
            return taxi_policy()[((row * 5 + col) * 5 + passenger) * 4 + dest]
        raise ValueError(self.name)

    def spec(self, slug: str, settings: dict[str, Any]) -> dict[str, Any]:
        space: dict[str, Any]
        if self.kind == "discrete":
            space = {"kind": "discrete", "actions": list(self.actions)}
        else:
            space = {
                "kind": "continuous",
                "dimensions": [
                    {"name": n, "low": self.low, "high": self.high} for n in self.dimensions
                ],
            }
        return {
            "slug": slug,
            "title": f"{self.env_id} (benchmark)",
            "features": [{"name": n} for n in self.feature_names],
            "action_space": space,
            "settings": settings,
        }


GYM_TASKS = {
    "acrobot": GymTask(
        "acrobot",
        "Acrobot-v1",
        "discrete",
        ("cos_a", "sin_a", "cos_b", "sin_b", "rate_a", "rate_b"),
        actions=("minus", "zero", "plus"),
        step_s=0.2,
    ),
    "taxi": GymTask(
        "taxi",
        "Taxi-v4",
        "discrete",
        tuple(
            [f"row_{i}" for i in range(5)]
            + [f"col_{i}" for i in range(5)]
            + [f"passenger_{i}" for i in range(5)]
            + [f"destination_{i}" for i in range(4)]
        ),
        actions=("south", "north", "east", "west", "pickup", "dropoff"),
        step_s=1.0,
        max_steps=200,
    ),
    "mountain-car": GymTask(
        "mountain-car",
        "MountainCarContinuous-v0",
        "continuous",
        ("position", "velocity"),
        max_steps=999,
    ),
    "reacher": GymTask(
        "reacher",
        "Reacher-v5",
        "continuous",
        (
            "cos_shoulder",
            "cos_elbow",
            "sin_shoulder",
            "sin_elbow",
            "target_x",
            "target_y",
            "rate_shoulder",
            "rate_elbow",
            "tip_to_target_x",
            "tip_to_target_y",
        ),
        dimensions=("shoulder_torque", "elbow_torque"),
        step_s=0.02,
        max_steps=50,
    ),
}


def reacher_fingertip(features: NDArray[Any]) -> NDArray[np.float64]:
    """Fingertip position (n, 2) in the arm's plane from Reacher-v5 features (n, 10): forward
    kinematics of the two links."""
    q = reacher_angles(features)
    return _forward(q[:, 0], q[:, 1])


def reacher_angles(features: NDArray[Any]) -> NDArray[np.float64]:
    """Shoulder and elbow angles (n, 2) from the features' cosines and sines."""
    x = np.asarray(features, np.float64)
    return np.stack([np.arctan2(x[:, 2], x[:, 0]), np.arctan2(x[:, 3], x[:, 1])], axis=1)


def reacher_joint_targets(features: NDArray[Any]) -> NDArray[np.float64]:
    """Joint angles (n, 2) that put the fingertip on the target: the two-link arm's closed-form
    inverse kinematics (law of cosines for the elbow), of the two elbow solutions the one
    nearer the arm's present angles. A target out of reach (nearer the shoulder than the
    links' difference, 0.01 m) gets the folded elbow, the nearest the arm can come."""
    x = np.asarray(features, np.float64)
    l1, l2 = REACHER_LINKS
    tx, ty = x[:, 4], x[:, 5]
    cos_elbow = np.clip((tx**2 + ty**2 - l1**2 - l2**2) / (2 * l1 * l2), -1.0, 1.0)
    now = reacher_angles(x)
    best = np.zeros_like(now)
    best_error = np.full(len(x), np.inf)
    for sign in (1.0, -1.0):
        elbow = sign * np.arccos(cos_elbow)
        shoulder = np.arctan2(ty, tx) - np.arctan2(l2 * np.sin(elbow), l1 + l2 * np.cos(elbow))
        target = np.stack([shoulder, elbow], axis=1)
        error = (_wrap(target - now) ** 2).sum(axis=1)
        nearer = error < best_error
        best[nearer], best_error[nearer] = target[nearer], error[nearer]
    return best


def reacher_expert(features: NDArray[Any]) -> NDArray[np.float64]:
    """Joint-space PD torques (n, 2) towards the inverse-kinematics angles for Reacher-v5
    features (n, 10), clipped to [-1, 1]: ``REACHER_KP`` times the angle error (wrapped to
    (-pi, pi]) minus ``REACHER_KD`` times the joint velocities."""
    x = np.asarray(features, np.float64)
    error = _wrap(reacher_joint_targets(x) - reacher_angles(x))
    return np.clip(REACHER_KP * error - REACHER_KD * x[:, 6:8], -1.0, 1.0)


def _forward(shoulder: NDArray[Any], elbow: NDArray[Any]) -> NDArray[np.float64]:
    l1, l2 = REACHER_LINKS
    return np.stack(
        [
            l1 * np.cos(shoulder) + l2 * np.cos(shoulder + elbow),
            l1 * np.sin(shoulder) + l2 * np.sin(shoulder + elbow),
        ],
        axis=1,
    )


def _wrap(angle: NDArray[Any]) -> NDArray[np.float64]:
    return np.asarray((angle + np.pi) % (2 * np.pi) - np.pi, np.float64)


@functools.cache
def taxi_policy() -> NDArray[np.int64]:
    """Optimal Taxi-v4 actions per state index, by value iteration on the published table."""
    import gymnasium as gym

    table = gym.make("Taxi-v4").unwrapped.P  # type: ignore[attr-defined]
    values = np.zeros(500)
    while True:
        q = np.zeros((500, 6))
        for state in range(500):
            for action in range(6):
                for p, nxt, reward, done in table[state][action]:
                    q[state, action] += p * (reward + (0.0 if done else 0.99 * values[nxt]))
        new = q.max(axis=1)
        if np.abs(new - values).max() < 1e-9:
            return q.argmax(axis=1).astype(np.int64)
        values = new


@dataclass
class Ensemble:
    """A bootstrap ensemble of small MLPs; discrete members give probabilities, continuous
    members regress the action."""

    task: GymTask
    members: list[Any]
    mean: NDArray[np.float64]
    scale: NDArray[np.float64]

    def outputs(self, obs: NDArray[Any]) -> NDArray[np.float64]:
        z = (np.asarray(obs, np.float64) - self.mean) / self.scale
        out = []
        for member in self.members:
            if self.task.kind == "discrete":
                probs = np.zeros((len(z), len(self.task.actions)))
                probs[:, member.classes_] = member.predict_proba(z)
                out.append(probs)
            else:
                pred = np.asarray(member.predict(z)).reshape(len(z), -1)
                out.append(np.clip(pred, self.task.low, self.task.high))
        return np.stack(out, axis=1)

    def act(self, obs: NDArray[Any]) -> tuple[NDArray[Any], NDArray[np.float64]]:
        members = self.outputs(obs)
        mean = members.mean(axis=1)
        action = mean.argmax(axis=1) if self.task.kind == "discrete" else mean
        return action, members


def fit(
    task: GymTask,
    x: NDArray[Any],
    y: NDArray[Any],
    rng: np.random.Generator,
    learner: str = "mlp",
) -> Ensemble:
    """Fit the bootstrap ensemble: `N_MEMBERS` members, each on its own bootstrap sample.

    ``learner`` names what a member is (`LEARNERS`): ``mlp``, a small neural network trained
    from a random start (its fit moves with the start as well as the sample), or ``trees``, an
    extremely randomised forest of `FOREST_TREES` trees (Geurts, Ernst and Wehenkel, "Extremely
    randomized trees", Machine Learning 63, 2006; scikit-learn's ExtraTrees), a local learner
    whose fit moves far less from one seed to the next.
    """
    if learner not in LEARNERS:
        raise ValueError(f"unknown learner {learner!r}; one of {LEARNERS}")
    x = np.asarray(x, np.float64)
    mean, scale = x.mean(axis=0), x.std(axis=0)
    scale[scale == 0] = 1.0
    z = (x - mean) / scale
    members = []
    for _ in range(N_MEMBERS):
        sample = rng.integers(0, len(z), len(z))
        seed = int(rng.integers(0, 2**31 - 1))
        if task.kind == "discrete":
            target = np.asarray(y, np.int64)[sample]
        else:
            target = np.asarray(y, np.float64).reshape(len(z), -1)[sample]
            if target.shape[1] == 1:  # one dimension: scikit-learn wants a 1-d target
                target = target.ravel()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            members.append(_member(task, learner, seed).fit(z[sample], target))
    return Ensemble(task, members, mean, scale)


def _member(task: GymTask, learner: str, seed: int) -> Any:
    discrete = task.kind == "discrete"
    if learner == "trees":
        forest = ExtraTreesClassifier if discrete else ExtraTreesRegressor
        return forest(n_estimators=FOREST_TREES, random_state=seed)
    network = MLPClassifier if discrete else MLPRegressor
    return network(hidden_layer_sizes=(HIDDEN_UNITS,), max_iter=MAX_ITER, random_state=seed)


@dataclass
class Episodes:
    """Steps of several episodes as upload columns, plus their returns."""

    columns: dict[str, list[Any]]
    returns: NDArray[np.float64]


def run_episodes(task: GymTask, policy: Ensemble | None, seeds: list[int], prefix: str) -> Episodes:
    """Run one episode per seed, all at once (one batched policy call per step).

    ``policy`` None: the expert drives (demonstrations, control "expert"). Otherwise the learner
    drives and reports its ensemble members' outputs.
    """
    import gymnasium as gym

    envs = [gym.make(task.env_id, max_episode_steps=task.max_steps) for _ in seeds]
    obs = np.stack([np.asarray(env.reset(seed=s)[0]) for env, s in zip(envs, seeds, strict=True)])
    live = np.ones(len(envs), dtype=bool)
    returns = np.zeros(len(envs))
    cols: dict[str, list[Any]] = {
        k: []
        for k in ("rollout", "step", "time_s", "features", "control")
        + (("expert_action",) if policy is None else ("learner_action", "learner_ensemble"))
    }
    step = 0
    while live.any():
        idx = np.flatnonzero(live)
        features = task.featurize(obs[idx])
        if policy is None:
            actions: Any = task.expert(features)
            members = None
        else:
            actions, members = policy.act(features)
        for j, i in enumerate(idx.tolist()):
            cols["rollout"].append(f"{prefix}-{i:03d}")
            cols["step"].append(step)
            cols["time_s"].append(round(step * task.step_s, 6))
            cols["features"].append(features[j].tolist())
            action = actions[j]
            value = int(action) if task.kind == "discrete" else [float(v) for v in action]
            if policy is None:
                cols["control"].append("expert")
                cols["expert_action"].append(value)
            else:
                assert members is not None
                cols["control"].append("learner")
                cols["learner_action"].append(value)
                cols["learner_ensemble"].append(members[j].tolist())
            env_action = int(action) if task.kind == "discrete" else np.asarray(action, np.float32)
            new_obs, reward, terminated, truncated, _ = envs[i].step(env_action)
            returns[i] += float(reward)
            obs[i] = new_obs
            if terminated or truncated:
                live[i] = False
        step += 1
    for env in envs:
        env.close()
    return Episodes(cols, returns)


def random_return(task: GymTask, seeds: list[int]) -> float:
    """Mean return of uniformly random actions on the evaluation episodes."""
    import gymnasium as gym

    total = []
    for seed in seeds:
        env = gym.make(task.env_id, max_episode_steps=task.max_steps)
        env.reset(seed=seed)
        env.action_space.seed(seed)
        done, ret = False, 0.0
        while not done:
            _, reward, terminated, truncated, _ = env.step(env.action_space.sample())
            ret += float(reward)
            done = terminated or truncated
        total.append(ret)
        env.close()
    return float(np.mean(total))


@dataclass(frozen=True)
class World:
    """One task and seed of the label-efficiency runs: the seeds of every episode and the score's
    scale (a random policy 0, the expert 1). bench/label_efficiency.py runs its rounds in these
    worlds, and the scripts that replay those rounds without the server (bench/oracle_bound.py,
    bench/refit_spread.py) run them in the same ones."""

    task: GymTask
    seed: int
    eval_seeds: list[int]
    expert_return: float
    random_return: float

    @property
    def _base(self) -> int:
        return 1_000_000 + 10_000 * self.seed

    def demo_seeds(self, count: int) -> list[int]:
        return [self._base + i for i in range(count)]

    def round_seeds(self, number: int, count: int) -> list[int]:
        """The learner's episodes of round `number` (1, 2, ...)."""
        return [self._base + 100 * number + i for i in range(count)]

    def score(self, mean_return: float) -> float:
        return float((mean_return - self.random_return) / (self.expert_return - self.random_return))


def add_world_sizes(parser: Any) -> None:
    """The command-line options that size a world's episodes (an argparse parser): the scripts
    that replay bench/label_efficiency.py's rounds take the same ones, with the same defaults."""
    parser.add_argument("--episodes", type=int, default=8, help="learner rollouts per round")
    parser.add_argument("--demos", type=int, default=2, help="demonstration episodes")
    parser.add_argument("--eval-episodes", type=int, default=10)
    parser.add_argument(
        "--learner", default="mlp", choices=LEARNERS, help="what each ensemble member is"
    )


def world(task: GymTask, seed: int, eval_episodes: int) -> World:
    """The world of `task` and `seed`, with its expert's and a random policy's mean returns on
    `eval_episodes` evaluation episodes."""
    eval_seeds = [1_000_000 + 10_000 * seed + 9_000 + i for i in range(eval_episodes)]
    return World(
        task=task,
        seed=seed,
        eval_seeds=eval_seeds,
        expert_return=run_episodes(task, None, eval_seeds, "eval").returns.mean(),
        random_return=random_return(task, eval_seeds),
    )
