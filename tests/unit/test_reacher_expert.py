"""The reacher benchmark task's scripted expert (bench/label_tasks.py) against MuJoCo's own
kinematics of gymnasium's Reacher-v5 model: the fingertip the expert computes is where the
simulator puts it, its inverse kinematics put the fingertip on the target, and the expert
reaches the target on seeded episodes. gymnasium with MuJoCo comes with the test extra."""

from __future__ import annotations

import gymnasium as gym
import mujoco
import numpy as np

from bench import label_tasks as tasks


def _features(qpos: np.ndarray) -> np.ndarray:
    """Reacher-v5 features (1, 10) of joint angles and target, velocities and offset zero:
    the kinematics read only the angles and the target."""
    q1, q2, tx, ty = qpos
    return np.array([[np.cos(q1), np.cos(q2), np.sin(q1), np.sin(q2), tx, ty, 0, 0, 0, 0]])


def _simulated_fingertip(env: object, qpos: np.ndarray) -> np.ndarray:
    """Where MuJoCo's forward kinematics of the model put the fingertip for these angles."""
    model, data = env.unwrapped.model, env.unwrapped.data  # type: ignore[attr-defined]
    data.qpos[:] = qpos
    mujoco.mj_kinematics(model, data)
    return np.array(data.body("fingertip").xpos[:2])


def test_fingertip_matches_the_simulators_kinematics() -> None:
    # docs/references.md, "MuJoCo's Reacher arm": MuJoCo's forward kinematics of reacher.xml
    env = gym.make("Reacher-v5")
    env.reset(seed=0)
    rng = np.random.default_rng(0)
    for _ in range(200):
        qpos = np.concatenate([rng.uniform(-np.pi, np.pi, 2), rng.uniform(-0.2, 0.2, 2)])
        simulated = _simulated_fingertip(env, qpos)
        np.testing.assert_allclose(
            tasks.reacher_fingertip(_features(qpos))[0], simulated, atol=1e-12
        )
    env.close()


def test_inverse_kinematics_put_the_fingertip_on_the_target() -> None:
    # docs/references.md, "MuJoCo's Reacher arm": the angles' fingertip by MuJoCo's kinematics
    env = gym.make("Reacher-v5")
    env.reset(seed=0)
    rng = np.random.default_rng(1)
    checked = 0
    while checked < 200:
        target = rng.uniform(-0.2, 0.2, 2)
        if not 0.011 < np.linalg.norm(target) < 0.2:  # Reacher-v5's goals, within reach
            continue
        start = np.concatenate([rng.uniform(-np.pi, np.pi, 2), target])
        angles = tasks.reacher_joint_targets(_features(start))[0]
        reached = _simulated_fingertip(env, np.concatenate([angles, target]))
        np.testing.assert_allclose(reached, target, atol=1e-9)
        checked += 1
    env.close()


def test_expert_reaches_the_target_and_beats_the_still_arm() -> None:
    # docs/references.md, "MuJoCo's Reacher arm": reward -(distance + squared torques) a step
    for seed in range(5):
        returns = []
        for policy in (tasks.reacher_expert, lambda x: np.zeros((len(x), 2))):
            env = gym.make("Reacher-v5")
            obs, _ = env.reset(seed=seed)
            total, done = 0.0, False
            while not done:
                obs, reward, terminated, truncated, _ = env.step(policy(obs[None])[0])
                total += float(reward)
                done = terminated or truncated
            returns.append(total)
            if len(returns) == 1:
                assert np.linalg.norm(obs[8:10]) < 0.005, seed  # fingertip within 5 mm
            env.close()
        assert returns[0] > returns[1], (seed, returns)


def test_expert_turns_the_short_way_across_the_half_turn() -> None:
    # docs/references.md, "MuJoCo's Reacher arm": the shoulder is an unlimited hinge, so an
    # angle and the same angle plus a full turn are one pose
    now = np.array([np.pi - 0.05, 0.5, 0.0, 0.0])
    goal = np.array([-np.pi + 0.05, 0.5])  # 0.1 rad further on, past the half turn
    target = tasks.reacher_fingertip(_features(np.concatenate([goal, [0.0, 0.0]])))[0]
    features = _features(np.concatenate([now[:2], target]))
    np.testing.assert_allclose(
        tasks.reacher_expert(features)[0], [tasks.REACHER_KP * 0.1, 0.0], atol=1e-9
    )
