"""Share of PPO training wall time spent inside the task engine, in one run.

Trains the ``ppo`` agent (Stable-Baselines3 PPO through needbench's adapter,
with the task kind's default settings unless ``--copies`` is given) for a
fixed budget, with timers round the task engine's own calls
(``TaskCore.step``, ``reset`` and the calls that hand out observations,
outcomes and infos, which the single env and the native vector env behind
the SB3 adapter go through),
and prints the engine's seconds, the whole ``learn()`` seconds and
their ratio. The rest is SB3 (the policy's forward passes, the rollout
buffer, the gradient updates), VecNormalize and the adapter's per-copy infos.
Target: under 10 % on needbench/Forage-v0. It prints the figures; it asserts
nothing.

    python -m needbench.benchmarks.perf.ppo_env_share [--task needbench/Forage-v0]
        [--steps 50000] [--seed 0] [--copies C]
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import time
from collections.abc import Iterator

import gymnasium as gym

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.agents.base import learning_env
from needbench.agents.deep import PPOAgent
from needbench.envs.task import TaskCore

TARGET_SHARE = 0.10
#: The engine's calls that every shell (single, vector) makes.
#: The task engine's calls that a step or reset goes through (the kernels and the
#: copies of their results handed out).
ENGINE_CALLS = ("step", "reset", "observe", "observation", "outcome", "info", "body_info",
                "single_info")


@contextlib.contextmanager
def timed_engine() -> Iterator[dict[str, float]]:
    """Seconds and call counts of each engine call while the block runs.

    Replaces the methods on the class for the block's duration (one process,
    one run) and puts the originals back after it.
    """
    figures = {name: 0.0 for name in ENGINE_CALLS} | {f"{name}_calls": 0 for name in ENGINE_CALLS}
    originals = {name: getattr(TaskCore, name) for name in ENGINE_CALLS}

    def timed(name, method):
        @functools.wraps(method)
        def run(self, *args, **kwargs):
            start = time.perf_counter()
            try:
                return method(self, *args, **kwargs)
            finally:
                figures[name] += time.perf_counter() - start
                figures[f"{name}_calls"] += 1
        return run

    for name, method in originals.items():
        setattr(TaskCore, name, timed(name, method))
    try:
        yield figures
    finally:
        for name, method in originals.items():
            setattr(TaskCore, name, method)


def measure(task: str, steps: int, seed: int, copies: int | None) -> dict[str, float]:
    """Seconds of engine calls and of the whole ``learn`` for one PPO run."""
    single = gym.make(task)
    settings = {} if copies is None else {"n_envs": copies}
    agent = PPOAgent(single.observation_space, single.action_space, **settings)
    env = learning_env(agent, task)
    agent.learn(env, 0, seed=seed)  # builds the model and imports torch outside the clock
    with timed_engine() as figures:
        start = time.perf_counter()
        agent.learn(env, steps, seed=seed)
        total = time.perf_counter() - start
    return {**figures, "steps": agent.model.num_timesteps, "learn": total,
            "copies": agent.model.n_envs, "path": type(env.unwrapped).__name__}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--task", default="needbench/Forage-v0")
    parser.add_argument("--steps", type=int, default=50_000, help="PPO training steps")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--copies", type=int, default=None,
                        help="env copies (default: the task kind's n_envs)")
    args = parser.parse_args(argv)
    figures = measure(args.task, args.steps, args.seed, args.copies)
    engine = sum(figures[name] for name in ENGINE_CALLS)
    share = engine / figures["learn"]
    print(f"task {args.task}, {figures['steps']} PPO training steps "
          f"({figures['copies']} copies, stepped by {figures['path']})")
    print(f"  learn() wall time      {figures['learn']:8.2f} s "
          f"({figures['steps'] / figures['learn']:,.0f} steps/s)")
    for name in ENGINE_CALLS:
        print(f"  TaskCore.{name:<13}{figures[name]:8.3f} s  ({figures[f'{name}_calls']} calls)")
    verdict = "meets" if share < TARGET_SHARE else "misses"
    print(f"  engine share of training {100 * share:6.2f} %  ({verdict} the "
          f"{100 * TARGET_SHARE:.0f} % target)")


if __name__ == "__main__":
    main()
