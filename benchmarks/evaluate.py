"""Evaluation rollouts: run a learned agent for N episodes and record each episode's trace.

A trace is the ``dict[str, np.ndarray]`` of the shared interfaces, for one
episode of T steps:

    level, set_point   (T+1, K)  reset info, then each step's info
    band               (K,)      the task's comfort bands
    drive              (T+1,)    D(h_0)..D(h_T) as the env reported them
    reward, reward_internal, reward_task   (T,)
    alive              (T,)      bool
    action             (T, ...)  what the agent chose
    intake             (T, K)
    terminated, truncated  ()    bool, how the episode ended
    <event>            (T, ...)  every other numeric key of the step infos
                                 (``disturbance``, ``cue``, ``eaten``...);
                                 spatial tasks give ``position`` (T, 2), the
                                 agent's place after each step (Arena: x, y
                                 in [0, 1]; Forage: row and column), which
                                 the report draws as a path

Seeding: episode e of an evaluation with seed s resets with
:func:`evaluation_seeds` ``(s, N)[e]``, drawn from its own
``numpy.random.SeedSequence`` stream, so evaluation worlds do not repeat the
learning copies' worlds (seed + j, :func:`needbench.agents.base.copy_seeds`)
and do not depend on how episodes are batched. Agents act with ``deterministic=True``.

Three ways to step, one result: ``"vector"`` (the task's native vector env,
the default and the fastest: all episodes side by side), ``"sync"``
(Gymnasium's SyncVectorEnv of single envs) and ``"single"`` (one single env,
episode after episode). Both vector modes autoreset in Gymnasium's next-step
mode: a copy's episode ends on the step that returns terminated or truncated;
what that copy returns afterwards belongs to its next episode and is not
recorded. The per-copy random streams of needbench tasks make the three modes
record the same traces for an agent whose actions depend only on its
observations.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium.vector import VectorEnv

from needbench.agents.base import Agent, require_next_step_autoreset, task_core
from needbench.benchmarks.metrics import episode_metrics
from needbench.envs.errors import ConfigError, check_choice

Trace = dict[str, np.ndarray]

MODES = ("vector", "sync", "single")

#: Spawn-key word of the evaluation stream (the learning copies use (j,) keys).
EVALUATION_STREAM = 0x65_76_61_6C  # "eval" in ASCII

#: Most episodes stepped side by side in one vector env; more run in batches.
MAX_BATCH = 256

#: Step-info keys with a place of their own in the trace (the rest are events).
_STATE_KEYS = ("level", "set_point", "drive")
_STEP_KEYS = ("reward_internal", "reward_task", "alive", "intake")
#: Step-info keys left out: they are functions of level, set point and band.
_DERIVED_KEYS = ("deviation", "in_band")


def evaluation_seeds(seed: int, episodes: int) -> list[int]:
    """Reset seeds (ints < 2**31) of the ``episodes`` evaluation episodes of ``seed``."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError("seed", seed, "a whole number >= 0")
    if isinstance(episodes, bool) or not isinstance(episodes, (int, np.integer)) or episodes < 1:
        raise ConfigError("episodes", episodes, "a whole number >= 1")
    seeds = []
    for episode in range(int(episodes)):
        sequence = np.random.SeedSequence(int(seed), spawn_key=(EVALUATION_STREAM, episode))
        seeds.append(int(sequence.generate_state(1, dtype=np.uint32)[0] >> np.uint32(1)))
    return seeds


def _task_core(env: gym.Env | VectorEnv) -> Any:
    core = task_core(env)
    if core is None:
        raise ConfigError("env.unwrapped.core", None,
                          "a needbench task (its core gives the comfort bands and time limit)")
    return core


def _is_recordable(value: Any) -> bool:
    return np.asarray(value).dtype.kind in "biuf"


def _trace_from_columns(start: Mapping[str, Any], columns: Mapping[str, np.ndarray],
                        band: np.ndarray, terminated: bool, truncated: bool) -> Trace:
    """A trace from one episode's reset info and its per-step columns.

    ``columns[key]`` has shape (T, ...): ``action``, ``reward`` and every key
    of the step infos.
    """
    trace: Trace = {
        key: np.concatenate([np.asarray(start[key], dtype=np.float64)[None],
                             np.asarray(columns[key], dtype=np.float64)])
        for key in _STATE_KEYS
    }
    trace["band"] = np.asarray(band, dtype=np.float64).copy()
    for key in ("reward", "reward_internal", "reward_task", "intake"):
        trace[key] = np.asarray(columns[key], dtype=np.float64)
    trace["alive"] = np.asarray(columns["alive"], dtype=bool)
    trace["action"] = np.asarray(columns["action"])
    trace["terminated"] = np.array(bool(terminated))
    trace["truncated"] = np.array(bool(truncated))
    known = set(_STATE_KEYS) | set(_STEP_KEYS) | set(_DERIVED_KEYS) | {"action", "reward"}
    for key, values in columns.items():
        if key not in known and _is_recordable(values):
            trace[key] = np.asarray(values)
    return trace


def rollout_single(env: gym.Env, agent: Agent, seed: int,
                   on_step: Callable[[gym.Env, Any, Any], None] | None = None) -> Trace:
    """One episode on a single env reset with ``seed``; ``on_step(env, action, reward)``
    after the reset (action and reward None) and after every step (e.g. to render)."""
    band = _task_core(env).band
    observation, start = env.reset(seed=int(seed))
    if on_step is not None:
        on_step(env, None, None)
    steps: list[dict[str, Any]] = []
    terminated = truncated = False
    while not (terminated or truncated):
        action = np.asarray(agent.act(observation, deterministic=True))
        observation, reward, terminated, truncated, info = env.step(action)
        steps.append({**{key: np.array(value, copy=True) for key, value in info.items()},
                      "action": action, "reward": reward})
        if on_step is not None:
            on_step(env, action, reward)
    columns = {key: np.stack([np.asarray(step[key]) for step in steps]) for key in steps[0]}
    return _trace_from_columns(start, columns, band, terminated, truncated)


def rollout_vector(env: VectorEnv, agent: Agent, seeds: Sequence[int]) -> list[Trace]:
    """One episode per copy of a next-step-autoreset vector env; copy i resets with seeds[i].

    All copies step together until every copy's first episode has ended;
    steps of a copy after its end are not recorded.
    """
    require_next_step_autoreset(env)
    if len(seeds) != env.num_envs:
        raise ConfigError("seeds", list(seeds), f"{env.num_envs} seeds, one per env copy")
    core = _task_core(env)
    band = core.band
    copies = env.num_envs
    observations, start = env.reset(seed=[int(s) for s in seeds])
    start = {key: np.array(value, copy=True) for key, value in start.items()}
    records: list[dict[str, np.ndarray]] = []
    length = np.zeros(copies, dtype=np.int64)
    ended = np.zeros(copies, dtype=bool)
    terminated_at_end = np.zeros(copies, dtype=bool)
    truncated_at_end = np.zeros(copies, dtype=bool)
    # A needbench episode lasts at most max_steps; the bound only guards against an env
    # that never ends one.
    for _ in range(int(core.max_steps) + 1):
        actions = np.asarray(agent.act(observations, deterministic=True))
        observations, reward, terminated, truncated, info = env.step(actions)
        record = {key: np.array(value, copy=True) for key, value in info.items()
                  if not key.startswith("_")}
        record["action"] = actions.copy()
        record["reward"] = np.asarray(reward, dtype=np.float64).copy()
        records.append(record)
        running = ~ended
        length += running
        done = running & (np.asarray(terminated) | np.asarray(truncated))
        terminated_at_end |= done & np.asarray(terminated)
        truncated_at_end |= done & np.asarray(truncated)
        ended |= done
        if ended.all():
            break
    else:
        raise RuntimeError(f"an episode lasted beyond max_steps = {core.max_steps}")
    stacked = {key: np.stack([record[key] for record in records]) for key in records[0]}
    traces = []
    for i in range(copies):
        columns = {key: values[:length[i], i] for key, values in stacked.items()}
        first = {key: start[key][i] for key in _STATE_KEYS}
        traces.append(_trace_from_columns(first, columns, band, bool(terminated_at_end[i]),
                                          bool(truncated_at_end[i])))
    return traces


def evaluate(agent: Agent, task_id: str, task_kwargs: Mapping[str, Any], episodes: int,
             seed: int, *, mode: str = "vector") -> list[Trace]:
    """Traces of ``episodes`` evaluation episodes of ``agent`` on a fresh copy of the task.

    Args:
        agent: a learned agent (acts batched, ``deterministic=True``).
        task_id: a registered needbench task id.
        task_kwargs: keyword arguments of the task (as for ``gymnasium.make``).
        episodes: number of episodes, >= 1.
        seed: the job's seed; episode e resets with ``evaluation_seeds(seed, episodes)[e]``.
        mode: 'vector' (native vector env), 'sync' (Gymnasium's SyncVectorEnv)
            or 'single' (one env, episode after episode).
    """
    check_choice("mode", mode, MODES)
    seeds = evaluation_seeds(seed, episodes)
    kwargs = dict(task_kwargs)
    if mode == "single":
        env = gym.make(task_id, **kwargs)
        try:
            return [rollout_single(env, agent, s) for s in seeds]
        finally:
            env.close()
    traces: list[Trace] = []
    vectorization = "vector_entry_point" if mode == "vector" else "sync"
    for begin in range(0, len(seeds), MAX_BATCH):
        batch = seeds[begin:begin + MAX_BATCH]
        env = gym.make_vec(task_id, num_envs=len(batch), vectorization_mode=vectorization,
                           **kwargs)
        try:
            traces += rollout_vector(env, agent, batch)
        finally:
            env.close()
    return traces


def evaluation_metrics(traces: Sequence[Trace], gamma: float,
                       need_names: Sequence[str] | None = None) -> list[dict[str, float]]:
    """``benchmarks.metrics.episode_metrics`` of each trace."""
    return [episode_metrics(trace, gamma, need_names) for trace in traces]
