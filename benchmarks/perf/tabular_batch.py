"""tabular-q learning many seeds in one NumPy pass, against one seed at a time.

Prints agent-steps per second (environment steps summed over every seed's
copies, learning included) on needbench/Forage-v0 for

* 64 seeds learned at once: one native vector env of 64 copies, one Q-table
  per seed, one vectorised update per step (``TabularQAgent.learn_many``);
* one seed learned alone on a single env, the Python loop that the batched
  pass replaces (``TabularQAgent.learn``);

and the ratio, measured in the same run. Target: at least 20x.

    python -m needbench.benchmarks.perf.tabular_batch [--steps 400]
"""

from __future__ import annotations

import argparse
import time

import gymnasium as gym

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.agents import make_agent

TASK = "needbench/Forage-v0"
#: Bins: 6 per need; of the world features (row, column, sin and cos of the hour,
#: nearest food dx, dy and stock, nearest water dx, dy, nearest shade dx, dy) the
#: directions to the sources and the half of the day, the rest ignored (1 bin).
HYPERPARAMETERS = {"internal_bins": 6, "internal_range": 3.0,
                   "world_bins": [1, 1, 2, 2, 3, 3, 1, 3, 3, 3, 3]}


def batched_rate(seeds: int, steps_per_seed: int) -> float:
    env = gym.make_vec(TASK, num_envs=seeds, vectorization_mode="vector_entry_point")
    agent = make_agent("tabular-q", env.single_observation_space, env.single_action_space,
                       **HYPERPARAMETERS)
    start = time.perf_counter()
    agent.learn_many(env, steps_per_seed, seeds=list(range(seeds)))
    return seeds * steps_per_seed / (time.perf_counter() - start)


def single_rate(steps: int) -> float:
    env = gym.make(TASK)
    agent = make_agent("tabular-q", env.observation_space, env.action_space, **HYPERPARAMETERS)
    start = time.perf_counter()
    agent.learn(env, steps, seed=0)
    return steps / (time.perf_counter() - start)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=2000, help="learning steps per seed")
    parser.add_argument("--seeds", type=int, default=64, help="seeds learned at once")
    args = parser.parse_args(argv)
    batched_rate(args.seeds, 50)  # warm-up: imports and first allocations
    batched = batched_rate(args.seeds, args.steps)
    single = single_rate(args.steps)
    print(f"{TASK}, {args.steps} learning steps per seed")
    print(f"{args.seeds} seeds in one pass: {batched:>12,.0f} agent-steps/s")
    print(f"1 seed, single env:   {single:>12,.0f} agent-steps/s")
    print(f"ratio: {batched / single:.1f}x (target: at least 20x)")


if __name__ == "__main__":
    main()
