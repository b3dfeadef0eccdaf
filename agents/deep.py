"""``ppo``, ``a2c``, ``dqn``, ``sac``: thin adapters over Stable-Baselines3.

Each agent wraps one SB3 algorithm behind the needbench agent protocol. SB3 and
torch are imported only when a deep agent is built, so the registry and every
NumPy agent work without the ``deep`` extra; building a deep agent without
Stable-Baselines3 raises :class:`~needbench.envs.errors.ConfigError` saying
what to install.

Environments
------------
SB3 steps C copies of the task, as one SB3 vector env:

* a needbench task that Gymnasium can re-make as its native vector env (one
  made with ``gymnasium.make`` or ``make_vec``, with no wrapper of the user's
  and no ``max_episode_steps``) is re-made so, and its C copies run in one
  batched task core (:class:`BatchedTaskCopies`). SB3 sees what it would see
  from a ``DummyVecEnv`` of C ``Monitor``-wrapped single envs: the same
  observations, rewards, per-copy ``info`` and autoreset, step for step
  (tests/test_deep.py checks that both give the same trained policy), at a
  fraction of the cost. The env passed in is read for its spec only;
* any other env goes through SB3's ``DummyVecEnv`` of single envs: a single
  env with C = 1 is used as it is; with C > 1 it is the first copy and C - 1
  more are re-made from ``env.spec`` (so it must come from ``gymnasium.make``,
  with wrappers Gymnasium can re-make); a vector env's C copies are re-made
  as single envs from its spec (the vector env itself is not stepped).

C is a vector env's ``num_envs`` (``n_envs``, if set, must equal it), or for
a single env ``n_envs``; ``None`` takes the task kind's number of copies from
:data:`KIND_DEFAULTS` (1 where the table gives none).

Copy j of a run with seed s is reset first with seed
``copy_seeds(s, C)[0][j]`` (the project's seeding convention, see
:mod:`needbench.agents.base`) and later from its own stream, as a single
env's ``reset()`` is; torch, NumPy and the action space are seeded with s by
SB3. Every ``learn`` call starts fresh episodes this way; a second call
continues training the same model (with the same number of copies).
Each worker sets torch to ``torch_threads`` intra-op threads (1 by default).

Hyperparameters
---------------
One frozen dataclass per algorithm. Fields left at ``None`` take the value of
the task kind from :data:`KIND_DEFAULTS`: ``outcome`` tasks (non-spatial
needbench tasks such as Menu, whose consequences play out within a few
steps), ``spatial`` tasks (the agent walks to sources, so horizons are
longer) and ``generic`` (any other Gymnasium env; SB3's own defaults).

Normalisation
-------------
With ``normalise_observations`` and/or ``normalise_rewards`` the copies are
wrapped in SB3's ``VecNormalize``: each observation entry is scaled by its
running mean and variance (clipped to +-10), and rewards are divided by the
running standard deviation of the discounted return (with the algorithm's
gamma). Drive-reduction rewards are small differences of drive, and the
source offsets of a grid task are fractions of the grid, so both matter on
Forage. The running statistics carry over to a second ``learn`` call, are
saved with the agent, and ``act`` scales observations with them as
``VecNormalize.normalize_obs`` does. Logged returns are the env's own rewards.

Logging
-------
During ``learn`` a callback reads every step's ``info`` and, at each
episode's end, logs through the needbench logger and SB3's own logger:
``charts/episodic_return`` (sum of rewards), ``charts/discounted_drive``
(sum_t gamma^t info["drive"] over the episode's steps, t = 0 for the first
step's D(h_1), gamma the algorithm's discount), ``charts/time_in_band`` (mean
of info["in_band"]) and ``charts/deviation/<need>`` (mean |info["deviation"]|
in band units). The drive is the env's reported value, never recomputed.
SB3's training scalars ``train/<name>`` are forwarded to the needbench
logger as ``losses/<name>`` at SB3's logging intervals
(``train/learning_rate`` as ``charts/learning_rate``; the ``n_updates``
counter is dropped). If the logger has a ``tensorboard_dir``
attribute (not None), SB3 writes TensorBoard event files there, including
the ``charts/...`` means over each logging interval.

Saving
------
The agent file of :mod:`needbench.agents.base`; the SB3 model (``model.save``
zip, without the env) is kept as the byte array ``state/sb3_model``, the
hyperparameters the model was built with (``None`` fields filled) in the
header's state, and the normalisation statistics as the arrays
``state/normalisation/<statistic>`` (``observation_mean``,
``observation_variance``, ``observation_count``, and ``return_...`` the
same; per key, ``.../<key>``, for dict observations).
"""

from __future__ import annotations

import copy
import dataclasses
import functools
import io
import math
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import VectorEnv

from needbench.agents.base import (
    Agent,
    Logger,
    NotApplicableError,
    NullLogger,
    build_hyperparameters,
    check_seed,
    check_total_steps,
    copy_seeds,
    task_core,
)
from needbench.envs.errors import ConfigError, check_choice, check_positive, check_range
from needbench.envs.streams import key_from

#: Keys of a vector env's spec that belong to the vectorisation, not to the task.
_VECTOR_KWARGS = ("num_envs", "vectorization_mode", "vector_kwargs", "wrappers")

TASK_KINDS = ("outcome", "spatial", "generic")


# --- optional dependency ----------------------------------------------------------


def import_stable_baselines3(agent_name: str):
    """The ``stable_baselines3`` module, or ConfigError naming the missing extra."""
    try:
        import stable_baselines3
    except ImportError as error:
        raise ConfigError("agent", agent_name,
                          "an agent whose dependencies are installed: deep agents need "
                          "Stable-Baselines3 and torch (pip install 'needbench[deep]', "
                          "after the CPU build of torch)") from error
    return stable_baselines3


def _set_torch_threads(threads: int) -> None:
    """One intra-op thread per worker by default: many workers share the cores."""
    import torch

    if torch.get_num_threads() != threads:
        torch.set_num_threads(threads)


# --- hyperparameters --------------------------------------------------------------


def _check_whole(path: str, value: Any, minimum: int) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ConfigError(path, value, f"a whole number >= {minimum}")


def _check_flag(path: str, value: Any, optional: bool) -> None:
    if value is None and optional:
        return
    if not isinstance(value, (bool, np.bool_)):
        raise ConfigError(path, value, "true or false" + (" (or None)" if optional else ""))


def _check_layers(path: str, value: Any) -> tuple[int, ...]:
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        raise ConfigError(path, value, "a list of layer widths, e.g. [64, 64]")
    layers = tuple(value)
    for width in layers:
        _check_whole(path, width, 1)
    return tuple(int(w) for w in layers)


class _CommonChecks:
    """Checks of the fields every deep agent's dataclass has."""

    def _check_common(self, name: str) -> None:
        object.__setattr__(self, "net_arch", _check_layers(f"{name}.net_arch", self.net_arch))
        if self.n_envs is not None:
            _check_whole(f"{name}.n_envs", self.n_envs, 1)
        _check_whole(f"{name}.torch_threads", self.torch_threads, 1)
        _check_whole(f"{name}.verbose", self.verbose, 0)
        if self.learning_rate is not None:
            check_positive(f"{name}.learning_rate", self.learning_rate)
        if self.gamma is not None:
            check_range(f"{name}.gamma", self.gamma, 0.0, 1.0)
        optional = type(self).__dataclass_fields__["normalise_observations"].default is None
        for flag in ("normalise_observations", "normalise_rewards"):
            _check_flag(f"{name}.{flag}", getattr(self, flag), optional)


@dataclass(frozen=True)
class PPOHyperparameters(_CommonChecks):
    learning_rate: float | None = None  # Adam step size (None: task kind's)
    n_steps: int | None = None  # steps per copy between updates (None: task kind's)
    batch_size: int | None = None  # minibatch size of each gradient step (None: task kind's)
    n_epochs: int = 10  # passes over each rollout
    gamma: float | None = None  # discount (None: task kind's)
    gae_lambda: float = 0.95  # GAE trade-off between bias and variance
    clip_range: float = 0.2  # PPO ratio clip
    ent_coef: float | None = None  # entropy bonus weight (None: task kind's)
    vf_coef: float = 0.5  # value loss weight
    max_grad_norm: float = 0.5  # gradient clipping
    net_arch: tuple[int, ...] = (64, 64)  # hidden layer widths (policy and value)
    n_envs: int | None = None  # env copies (None: a vector env's num_envs, else task kind's)
    normalise_observations: bool | None = None  # VecNormalize observations (None: kind's)
    normalise_rewards: bool | None = None  # VecNormalize rewards (None: task kind's)
    torch_threads: int = 1  # torch intra-op threads of this worker
    verbose: int = 0  # SB3 verbosity (0 silent)

    def __post_init__(self):
        self._check_common("ppo")
        if self.n_steps is not None:
            _check_whole("ppo.n_steps", self.n_steps, 2)
        if self.batch_size is not None:
            _check_whole("ppo.batch_size", self.batch_size, 2)
        _check_whole("ppo.n_epochs", self.n_epochs, 1)
        check_range("ppo.gae_lambda", self.gae_lambda, 0.0, 1.0)
        check_positive("ppo.clip_range", self.clip_range)
        if self.ent_coef is not None:
            check_range("ppo.ent_coef", self.ent_coef, 0.0, math.inf)
        check_range("ppo.vf_coef", self.vf_coef, 0.0, math.inf)
        check_positive("ppo.max_grad_norm", self.max_grad_norm)


@dataclass(frozen=True)
class A2CHyperparameters(_CommonChecks):
    learning_rate: float = 7e-4  # RMSprop step size
    n_steps: int | None = None  # steps per copy between updates (None: task kind's)
    gamma: float | None = None  # discount (None: task kind's)
    gae_lambda: float = 1.0  # 1 = plain n-step returns
    ent_coef: float | None = None  # entropy bonus weight (None: task kind's)
    vf_coef: float = 0.5  # value loss weight
    max_grad_norm: float = 0.5  # gradient clipping
    net_arch: tuple[int, ...] = (64, 64)  # hidden layer widths (policy and value)
    n_envs: int | None = None  # env copies (None: a vector env's num_envs, else task kind's)
    normalise_observations: bool = False  # wrap the copies in VecNormalize (observations)
    normalise_rewards: bool = False  # wrap the copies in VecNormalize (rewards)
    torch_threads: int = 1  # torch intra-op threads of this worker
    verbose: int = 0  # SB3 verbosity (0 silent)

    def __post_init__(self):
        self._check_common("a2c")
        if self.n_steps is not None:
            _check_whole("a2c.n_steps", self.n_steps, 1)
        check_range("a2c.gae_lambda", self.gae_lambda, 0.0, 1.0)
        if self.ent_coef is not None:
            check_range("a2c.ent_coef", self.ent_coef, 0.0, math.inf)
        check_range("a2c.vf_coef", self.vf_coef, 0.0, math.inf)
        check_positive("a2c.max_grad_norm", self.max_grad_norm)


@dataclass(frozen=True)
class DQNHyperparameters(_CommonChecks):
    learning_rate: float = 5e-4  # Adam step size
    buffer_size: int = 50_000  # replay buffer capacity (transitions)
    learning_starts: int | None = None  # steps of pure exploration first (None: task kind's)
    batch_size: int = 64  # replay minibatch size
    gamma: float | None = None  # discount (None: task kind's)
    train_freq: int = 4  # env steps (per copy) between gradient phases
    gradient_steps: int = 1  # gradient steps per phase
    target_update_interval: int = 1000  # env steps between target network copies
    exploration_fraction: float = 0.3  # share of the budget over which epsilon decays
    exploration_final_eps: float = 0.05  # epsilon after the decay
    net_arch: tuple[int, ...] = (64, 64)  # hidden layer widths of the Q network
    n_envs: int | None = None  # env copies (None: a vector env's num_envs, else task kind's)
    normalise_observations: bool = False  # wrap the copies in VecNormalize (observations)
    normalise_rewards: bool = False  # wrap the copies in VecNormalize (rewards)
    torch_threads: int = 1  # torch intra-op threads of this worker
    verbose: int = 0  # SB3 verbosity (0 silent)

    def __post_init__(self):
        self._check_common("dqn")
        _check_whole("dqn.buffer_size", self.buffer_size, 1)
        if self.learning_starts is not None:
            _check_whole("dqn.learning_starts", self.learning_starts, 0)
        _check_whole("dqn.batch_size", self.batch_size, 1)
        _check_whole("dqn.train_freq", self.train_freq, 1)
        _check_whole("dqn.gradient_steps", self.gradient_steps, 1)
        _check_whole("dqn.target_update_interval", self.target_update_interval, 1)
        check_range("dqn.exploration_fraction", self.exploration_fraction, 0.0, 1.0)
        check_range("dqn.exploration_final_eps", self.exploration_final_eps, 0.0, 1.0)


@dataclass(frozen=True)
class SACHyperparameters(_CommonChecks):
    learning_rate: float = 3e-4  # Adam step size (actor, critics, temperature)
    buffer_size: int = 100_000  # replay buffer capacity (transitions)
    learning_starts: int | None = None  # steps of uniform actions first (None: task kind's)
    batch_size: int = 256  # replay minibatch size
    tau: float = 0.005  # soft target update rate
    gamma: float | None = None  # discount (None: task kind's)
    train_freq: int = 1  # env steps (per copy) between gradient phases
    gradient_steps: int = 1  # gradient steps per phase
    ent_coef: str | float = "auto"  # entropy temperature, or "auto" to tune it
    net_arch: tuple[int, ...] = (256, 256)  # hidden layer widths (actor and critics)
    n_envs: int | None = None  # env copies (None: a vector env's num_envs, else task kind's)
    normalise_observations: bool = False  # wrap the copies in VecNormalize (observations)
    normalise_rewards: bool = False  # wrap the copies in VecNormalize (rewards)
    torch_threads: int = 1  # torch intra-op threads of this worker
    verbose: int = 0  # SB3 verbosity (0 silent)

    def __post_init__(self):
        self._check_common("sac")
        _check_whole("sac.buffer_size", self.buffer_size, 1)
        if self.learning_starts is not None:
            _check_whole("sac.learning_starts", self.learning_starts, 0)
        _check_whole("sac.batch_size", self.batch_size, 1)
        check_range("sac.tau", self.tau, 0.0, 1.0)
        _check_whole("sac.train_freq", self.train_freq, 1)
        _check_whole("sac.gradient_steps", self.gradient_steps, 1)
        if isinstance(self.ent_coef, str):
            check_choice("sac.ent_coef", self.ent_coef, ("auto",))
        else:
            check_positive("sac.ent_coef", self.ent_coef)


#: Values of the ``None`` fields per algorithm and task kind. Outcome tasks
#: (Menu, Gamble...) pay off within a few steps, so a shorter horizon learns
#: faster; spatial tasks need the agent to walk to a source. ``generic`` holds
#: SB3's own defaults. The outcome values were checked on Menu (PPO reaches
#: time in band 0.83-0.99 in 12 000 steps, tests/test_deep.py). The spatial
#: PPO values were tuned on Forage (see tests/test_deep.py for the measured
#: figures): many copies and long rollouts with large minibatches, a short
#: discount (0.9; drive reduction pays as soon as the agent reaches a source,
#: and the shorter the horizon the less the critic's error in the drive term
#: swamps the advantage), a larger step size, and VecNormalize on observations
#: and rewards. The spatial values of the other algorithms are a starting
#: point only.
KIND_DEFAULTS: dict[str, dict[str, dict[str, Any]]] = {
    "ppo": {
        "outcome": {"n_steps": 256, "batch_size": 64, "gamma": 0.95, "learning_rate": 3e-4,
                    "ent_coef": 0.01, "normalise_observations": False,
                    "normalise_rewards": False},
        "spatial": {"n_envs": 64, "n_steps": 128, "batch_size": 2048, "gamma": 0.9,
                    "learning_rate": 3e-3, "ent_coef": 0.01, "normalise_observations": True,
                    "normalise_rewards": True},
        "generic": {"n_steps": 2048, "batch_size": 64, "gamma": 0.99, "learning_rate": 3e-4,
                    "ent_coef": 0.0, "normalise_observations": False,
                    "normalise_rewards": False},
    },
    "a2c": {
        "outcome": {"n_steps": 16, "gamma": 0.95, "ent_coef": 0.01},
        "spatial": {"n_steps": 32, "gamma": 0.99, "ent_coef": 0.01},
        "generic": {"n_steps": 5, "gamma": 0.99, "ent_coef": 0.0},
    },
    "dqn": {
        "outcome": {"learning_starts": 500, "gamma": 0.95},
        "spatial": {"learning_starts": 1000, "gamma": 0.99},
        "generic": {"learning_starts": 100, "gamma": 0.99},
    },
    "sac": {
        "outcome": {"learning_starts": 500, "gamma": 0.95},
        "spatial": {"learning_starts": 1000, "gamma": 0.99},
        "generic": {"learning_starts": 100, "gamma": 0.99},
    },
}


def task_kind(env: gym.Env | VectorEnv) -> str:
    """``spatial`` or ``outcome`` for a needbench task, ``generic`` for any other env."""
    core = task_core(env)
    if core is None:
        return "generic"
    return "spatial" if getattr(core.world, "spatial", False) else "outcome"


def resolve_hyperparameters(algorithm: str, hyperparameters: Any, kind: str) -> Any:
    """A copy of ``hyperparameters`` with every ``None`` field set from :data:`KIND_DEFAULTS`."""
    check_choice("task kind", kind, TASK_KINDS)
    table = KIND_DEFAULTS[algorithm][kind]
    filled = {key: value for key, value in table.items()
              if getattr(hyperparameters, key) is None}
    return dataclasses.replace(hyperparameters, **filled)


# --- stability accounting ------------------------------------------------------------


class EpisodeStability:
    """Per-copy running sums of return and stability over the current episodes.

    ``step`` takes one vector step (rewards (C,), dones (C,), one info dict per
    copy) and returns the scalars of each episode that ended, as
    ``(copy index, {tag: value})`` pairs. Stability tags are logged only when
    the env reports ``drive``, ``in_band`` and ``deviation`` (every needbench
    task does); other envs get ``charts/episodic_return`` alone.
    """

    def __init__(self, copies: int, gamma: float, need_names: tuple[str, ...] | None = None):
        self.copies = copies
        self.gamma = float(gamma)
        self.need_names = need_names
        self._start(np.ones(copies, dtype=bool))

    def _start(self, mask: np.ndarray) -> None:
        if not hasattr(self, "episode_return"):
            self.episode_return = np.zeros(self.copies)
            self.discounted_drive = np.zeros(self.copies)
            self.discount = np.ones(self.copies)
            self.steps = np.zeros(self.copies, dtype=np.int64)
            self.steps_in_band = np.zeros(self.copies)
            self.absolute_deviation: np.ndarray | None = None
        self.episode_return[mask] = 0.0
        self.discounted_drive[mask] = 0.0
        self.discount[mask] = 1.0
        self.steps[mask] = 0
        self.steps_in_band[mask] = 0.0
        if self.absolute_deviation is not None:
            self.absolute_deviation[mask] = 0.0

    def step(self, rewards: np.ndarray, dones: np.ndarray,
             infos: list[Mapping[str, Any]]) -> list[tuple[int, dict[str, float]]]:
        rewards = np.asarray(rewards, dtype=np.float64).reshape(self.copies)
        dones = np.asarray(dones, dtype=bool).reshape(self.copies)
        self.episode_return += rewards
        self.steps += 1
        stability = all(key in infos[0] for key in ("drive", "in_band", "deviation"))
        if stability:
            drive = np.array([float(info["drive"]) for info in infos])
            in_band = np.array([float(info["in_band"]) for info in infos])
            deviation = np.abs(np.array([np.asarray(info["deviation"], dtype=np.float64)
                                         for info in infos]))
            if self.absolute_deviation is None:
                self.absolute_deviation = np.zeros_like(deviation)
            self.discounted_drive += self.discount * drive
            self.discount *= self.gamma
            self.steps_in_band += in_band
            self.absolute_deviation += deviation
        ended = []
        for i in np.flatnonzero(dones):
            scalars = {"charts/episodic_return": float(self.episode_return[i])}
            if stability:
                steps = float(self.steps[i])
                scalars["charts/discounted_drive"] = float(self.discounted_drive[i])
                scalars["charts/time_in_band"] = float(self.steps_in_band[i] / steps)
                names = self.need_names or tuple(
                    str(k) for k in range(self.absolute_deviation.shape[1]))
                for k, need in enumerate(names):
                    scalars[f"charts/deviation/{need}"] = float(
                        self.absolute_deviation[i, k] / steps)
            ended.append((int(i), scalars))
        if dones.any():
            self._start(dones)
        return ended


@functools.cache
def _callback_classes():
    """SB3 classes built on first use (they subclass SB3 types, imported lazily)."""
    from stable_baselines3.common.callbacks import BaseCallback
    from stable_baselines3.common.logger import KVWriter
    from stable_baselines3.common.vec_env import VecNormalize

    class ForwardTrainingScalars(KVWriter):
        """An SB3 logger output that hands ``train/...`` scalars to a needbench logger."""

        def __init__(self, logger: Logger):
            self.target = logger

        def write(self, key_values, key_excluded, step: int = 0) -> None:
            for key, value in key_values.items():
                if not key.startswith("train/") or isinstance(value, str):
                    continue
                if not np.isscalar(value) and np.ndim(value) != 0:
                    continue
                name = key[len("train/"):]
                if name == "n_updates":  # a counter, not a curve
                    continue
                tag = "charts/learning_rate" if name == "learning_rate" else f"losses/{name}"
                self.target.log_scalar(tag, float(value), int(step))

        def close(self) -> None:
            return None

    class StabilityCallback(BaseCallback):
        """Logs :class:`EpisodeStability` scalars at each episode end during learning."""

        def __init__(self, logger: Logger, need_names: tuple[str, ...] | None):
            super().__init__(verbose=0)
            self.target = logger
            self.need_names = need_names
            self.stability: EpisodeStability | None = None

        def _on_training_start(self) -> None:
            self.stability = EpisodeStability(self.training_env.num_envs, self.model.gamma,
                                              self.need_names)
            self.logger.output_formats.append(ForwardTrainingScalars(self.target))

        def _on_step(self) -> bool:
            rewards = self.locals["rewards"]
            if isinstance(self.training_env, VecNormalize):
                rewards = self.training_env.get_original_reward()  # the env's, not the scaled
            ended = self.stability.step(rewards, self.locals["dones"], self.locals["infos"])
            for _, scalars in ended:
                for tag, value in scalars.items():
                    self.target.log_scalar(tag, value, int(self.num_timesteps))
                    self.logger.record_mean(tag, value)
            return True

        def _on_training_end(self) -> None:
            # SB3 dumps only every log_interval; flush the last partial interval.
            self.logger.dump(self.num_timesteps)
            self.logger.output_formats[:] = [
                f for f in self.logger.output_formats if not isinstance(f, ForwardTrainingScalars)]

    return StabilityCallback, ForwardTrainingScalars


# --- environments -------------------------------------------------------------------


class FirstResetSeed(gym.Wrapper):
    """Replaces the seed of the first reset with this copy's own seed.

    SB3 seeds copy j with ``seed + j``; needbench's convention is
    :func:`~needbench.agents.base.copy_seeds`. Later resets pass through.
    """

    def __init__(self, env: gym.Env, seed: int):
        super().__init__(env)
        self.copy_seed = seed
        self._first = True

    def reset(self, *, seed: int | None = None, options: dict | None = None):
        if self._first:
            self._first = False
            seed = self.copy_seed
        return self.env.reset(seed=seed, options=options)


def _remake(spec: Any, path: str) -> Callable[[], gym.Env]:
    if spec is None:
        raise ConfigError(path, None, "an env made with gymnasium.make / make_vec (a spec to "
                          "re-make copies from), or n_envs = 1 with a single env")
    kwargs = {k: v for k, v in dict(spec.kwargs).items() if k not in _VECTOR_KWARGS}
    single = dataclasses.replace(spec, kwargs={})

    def make() -> gym.Env:
        try:
            return gym.make(single, **kwargs)
        except ValueError as error:  # Gymnasium cannot re-make a wrapper it has no arguments of
            raise ConfigError(path, spec.id, "an env Gymnasium can re-make from its spec "
                              "(wrappers that inherit gymnasium.utils.RecordConstructorArgs), "
                              f"or n_envs = 1 ({error})") from error

    return make


def single_copies(env: gym.Env | VectorEnv, copies: int) -> list[gym.Env]:
    """The ``copies`` single envs SB3's ``DummyVecEnv`` steps (see the module docstring)."""
    if isinstance(env, VectorEnv):
        make = _remake(env.unwrapped.spec, "env.spec")
        return [make() for _ in range(copies)]
    if not isinstance(env, gym.Env):
        raise ConfigError("env", env, "a gymnasium.Env or a gymnasium.vector.VectorEnv")
    if copies == 1:
        return [env]
    make = _remake(env.spec, "env.spec")
    return [env] + [make() for _ in range(copies - 1)]


def native_vector_spec(env: gym.Env | VectorEnv) -> tuple[Any, dict[str, Any]] | None:
    """(spec without keywords, task keywords) that re-make ``env`` as its task's native
    vector env, or None when that would leave something out.

    Only a needbench task made by ``gymnasium.make`` / ``make_vec`` qualifies:
    with a vector entry point, no ``max_episode_steps`` (the task's own
    ``max_steps`` is its time limit) and no wrapper of the user's (those act
    on single envs, which the batched core would bypass).
    """
    if task_core(env) is None:
        return None
    spec = env.unwrapped.spec if isinstance(env, VectorEnv) else env.spec
    if (spec is None or spec.vector_entry_point is None or spec.max_episode_steps is not None
            or spec.additional_wrappers):
        return None
    kwargs = dict(spec.kwargs)
    if kwargs.get("wrappers"):
        return None
    task_kwargs = {k: v for k, v in kwargs.items() if k not in _VECTOR_KWARGS}
    return dataclasses.replace(spec, kwargs={}), task_kwargs


def _copy_of(observations: Any, index: int) -> Any:
    """Copy ``index``'s observation out of a batch (array or dict of arrays)."""
    if isinstance(observations, Mapping):
        return {key: np.array(value[index]) for key, value in observations.items()}
    return np.array(observations[index])


def per_copy_infos(info: Mapping[str, Any], copies: int) -> list[dict[str, Any]]:
    """One info dict per copy from a batched info, as the single env gives it: 0-d
    entries as Python scalars, others as arrays of their own."""
    keys, columns = list(info), []
    for value in info.values():
        value = np.asarray(value)
        columns.append(value.tolist() if value.ndim == 1 else list(value.copy()))
    if not keys:
        return [{} for _ in range(copies)]
    return [dict(zip(keys, row, strict=True)) for row in zip(*columns, strict=True)]


@functools.cache
def _batched_copies_class():
    """The SB3 vector env over one batched task core (an SB3 subclass, built on first use)."""
    from stable_baselines3.common.vec_env.base_vec_env import VecEnv as StableVecEnv

    class BatchedTaskCopies(StableVecEnv):
        """C copies of a needbench task in one batched core, as SB3 sees C single envs.

        What SB3's ``DummyVecEnv`` of C ``Monitor(FirstResetSeed(env))`` gives:
        a copy whose episode ends is reset at once, its last observation in
        ``info["terminal_observation"]``, with ``info["TimeLimit.truncated"]``
        and Monitor's ``info["episode"]`` (``r`` return, ``l`` length, ``t``
        seconds since the start). Copy j is first reset with
        ``reset_seeds[j]``, later from its own generator (a single env's
        ``np_random``); SB3's ``seed()`` is overridden by the reset seeds, as
        :class:`FirstResetSeed` does.
        """

        def __init__(self, vector_env: VectorEnv, reset_seeds: list[int]):
            self.vector_env = vector_env
            self.core = vector_env.unwrapped.core
            self.batched_action_space = vector_env.action_space
            self.reset_seeds = list(reset_seeds)
            self.generators: list[np.random.Generator] | None = None
            copies = vector_env.num_envs
            self.episode_return = np.zeros(copies)
            self.episode_length = np.zeros(copies, dtype=np.int64)
            self.start_time = time.time()
            self.actions: np.ndarray | None = None
            super().__init__(copies, vector_env.single_observation_space,
                             vector_env.single_action_space)

        def _keys(self, copies: Any) -> np.ndarray:
            return np.array([key_from(self.generators[i]) for i in copies], dtype=np.uint64)

        def reset(self):
            if self.generators is None:
                # As NeedEnv.reset(seed=s): np_random from s, then one stream key from it.
                self.generators = [gym.utils.seeding.np_random(s)[0] for s in self.reset_seeds]
            self.core.reset(self._keys(range(self.num_envs)))
            self.episode_return[:] = 0.0
            self.episode_length[:] = 0
            self.reset_infos = per_copy_infos(self.core.body_info(), self.num_envs)
            return self.core.observe()

        def step_async(self, actions: np.ndarray) -> None:
            self.actions = actions

        def step_wait(self):
            actions = self.core.validate_actions(self.actions, self.batched_action_space)
            rewards, terminated, truncated, info = self.core.step(actions)
            observations = self.core.observe()
            self.episode_return += rewards
            self.episode_length += 1
            dones = terminated | truncated
            infos = per_copy_infos(info, self.num_envs)
            if dones.any():
                ended = np.flatnonzero(dones)
                for i in ended:
                    infos[i]["terminal_observation"] = _copy_of(observations, i)
                    infos[i]["TimeLimit.truncated"] = bool(truncated[i] and not terminated[i])
                    infos[i]["episode"] = {"r": round(float(self.episode_return[i]), 6),
                                           "l": int(self.episode_length[i]),
                                           "t": round(time.time() - self.start_time, 6)}
                self.core.reset(self._keys(ended), dones)
                observations = self.core.observe()
                self.episode_return[dones] = 0.0
                self.episode_length[dones] = 0
            # float32 rewards, as DummyVecEnv's buffer holds them.
            return observations, rewards.astype(np.float32), dones, infos

        def close(self) -> None:
            self.vector_env.close()

        def get_attr(self, attr_name: str, indices: Any = None) -> list[Any]:
            """The vector env's attribute, once per copy asked for (one core serves all)."""
            value = getattr(self.vector_env, attr_name)
            return [value for _ in self._get_indices(indices)]

        def set_attr(self, attr_name: str, value: Any, indices: Any = None) -> None:
            raise AttributeError(f"cannot set {attr_name!r} per copy: the copies share one "
                                 "batched task core")

        def env_method(self, method_name: str, *args: Any, indices: Any = None,
                       **kwargs: Any) -> list[Any]:
            raise AttributeError(f"cannot call {method_name!r} per copy: the copies share one "
                                 "batched task core")

        def env_is_wrapped(self, wrapper_class: type, indices: Any = None) -> list[bool]:
            return [False for _ in self._get_indices(indices)]

    return BatchedTaskCopies


def batched_task_copies(vector_env: VectorEnv, reset_seeds: list[int]) -> Any:
    """An SB3 vector env stepping ``vector_env``'s batched core (see the module docstring)."""
    return _batched_copies_class()(vector_env, reset_seeds)


# --- normalisation ------------------------------------------------------------------


def _running_statistics(mean: np.ndarray, variance: np.ndarray, count: float) -> Any:
    from stable_baselines3.common.running_mean_std import RunningMeanStd

    statistics = RunningMeanStd(shape=np.shape(mean))
    statistics.mean = np.array(mean, dtype=np.float64)
    statistics.var = np.array(variance, dtype=np.float64)
    statistics.count = float(count)
    return statistics


@dataclass
class Normalisation:
    """VecNormalize's settings and running statistics, kept between ``learn`` calls.

    ``observation_statistics`` is an SB3 ``RunningMeanStd`` (a dict of them
    per key for dict observations; None without observation normalisation),
    ``return_statistics`` that of the discounted return. ``clip_observation``
    (normalised units) and ``epsilon`` are VecNormalize's.
    """

    observations: bool
    rewards: bool
    observation_statistics: Any = None
    return_statistics: Any = None
    clip_observation: float = 10.0
    clip_reward: float = 10.0
    epsilon: float = 1e-8

    def wrap(self, vec_env: Any, gamma: float) -> Any:
        """``vec_env`` in a training VecNormalize that starts from these statistics."""
        from stable_baselines3.common.vec_env import VecNormalize

        wrapped = VecNormalize(vec_env, norm_obs=self.observations, norm_reward=self.rewards,
                               clip_obs=self.clip_observation, clip_reward=self.clip_reward,
                               gamma=gamma, epsilon=self.epsilon)
        if self.observation_statistics is not None:
            wrapped.obs_rms = copy.deepcopy(self.observation_statistics)
        if self.return_statistics is not None:
            wrapped.ret_rms = copy.deepcopy(self.return_statistics)
        return wrapped

    def take_statistics(self, wrapped: Any) -> None:
        """Keep the statistics a VecNormalize reached."""
        self.observation_statistics = copy.deepcopy(wrapped.obs_rms) if self.observations \
            else None
        self.return_statistics = copy.deepcopy(wrapped.ret_rms)

    def scale(self, observations: Any) -> Any:
        """Observations scaled as ``VecNormalize.normalize_obs`` does (float32)."""
        if not self.observations or self.observation_statistics is None:
            return observations

        def one(values: np.ndarray, statistics: Any) -> np.ndarray:
            scaled = (values - statistics.mean) / np.sqrt(statistics.var + self.epsilon)
            return np.clip(scaled, -self.clip_observation, self.clip_observation).astype(
                np.float32)

        if isinstance(self.observation_statistics, dict):
            return {key: one(np.asarray(value), self.observation_statistics[key])
                    if key in self.observation_statistics else value
                    for key, value in observations.items()}
        return one(np.asarray(observations), self.observation_statistics)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """(JSON-able settings, named arrays) for the agent file."""
        meta = {"observations": self.observations, "rewards": self.rewards,
                "clip_observation": self.clip_observation, "clip_reward": self.clip_reward,
                "epsilon": self.epsilon,
                "keys": (sorted(self.observation_statistics)
                         if isinstance(self.observation_statistics, dict) else None)}
        arrays: dict[str, np.ndarray] = {}

        def put(prefix: str, statistics: Any) -> None:
            arrays[f"{prefix}_mean"] = np.asarray(statistics.mean, dtype=np.float64)
            arrays[f"{prefix}_variance"] = np.asarray(statistics.var, dtype=np.float64)
            arrays[f"{prefix}_count"] = np.asarray(statistics.count, dtype=np.float64)

        if isinstance(self.observation_statistics, dict):
            for key, statistics in self.observation_statistics.items():
                put(f"observation/{key}", statistics)
        elif self.observation_statistics is not None:
            put("observation", self.observation_statistics)
        if self.return_statistics is not None:
            put("return", self.return_statistics)
        return meta, arrays

    @classmethod
    def restore(cls, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> Normalisation:
        def get(prefix: str) -> Any:
            names = [f"{prefix}_{part}" for part in ("mean", "variance", "count")]
            missing = [name for name in names if name not in arrays]
            if missing:
                raise ConfigError("state/normalisation", sorted(arrays),
                                  "arrays " + ", ".join(names))
            return _running_statistics(*(arrays[name] for name in names))

        observation = None
        if meta["keys"] is not None:
            observation = {key: get(f"observation/{key}") for key in meta["keys"]}
        elif meta["observations"]:
            observation = get("observation")
        returns = get("return") if "return_mean" in arrays else None
        return cls(bool(meta["observations"]), bool(meta["rewards"]), observation, returns,
                   float(meta["clip_observation"]), float(meta["clip_reward"]),
                   float(meta["epsilon"]))


# --- the agents ---------------------------------------------------------------------


class DeepAgent(Agent):
    """Common adapter: SB3 model, env copies, logging and the agent file.

    Subclasses set ``name``, ``Hyperparameters``, ``algorithm`` (the SB3 class
    name), ``action_kinds`` (allowed action space types) and
    ``_algorithm_arguments`` (constructor keywords of the SB3 class).
    """

    algorithm: ClassVar[str] = ""
    action_kinds: ClassVar[tuple[type[spaces.Space], ...]] = (spaces.Space,)
    log_interval: ClassVar[int] = 1

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space,
                 **hyperparameters: Any):
        super().__init__(observation_space, action_space, **hyperparameters)
        import_stable_baselines3(self.name)
        if not isinstance(action_space, self.action_kinds):
            allowed = " or ".join(kind.__name__ for kind in self.action_kinds)
            raise NotApplicableError("action_space", action_space,
                                     f"a {allowed} action space ({self.name} acts only on those)")
        self.model: Any = None
        #: The hyperparameters the model was built with (None fields filled), once built.
        self.resolved_hyperparameters: Any = None
        #: VecNormalize settings and statistics, when the agent normalises.
        self.normalisation: Normalisation | None = None

    def _algorithm_class(self):
        sb3 = import_stable_baselines3(self.name)
        return getattr(sb3, self.algorithm)

    def _algorithm_arguments(self, resolved: Any) -> dict[str, Any]:
        raise NotImplementedError

    def _policy(self) -> str:
        return "MultiInputPolicy" if isinstance(self.observation_space, spaces.Dict) \
            else "MlpPolicy"

    def _check_env_spaces(self, env: gym.Env | VectorEnv) -> None:
        if isinstance(env, VectorEnv):
            observation_space, action_space = env.single_observation_space, \
                env.single_action_space
        else:
            observation_space, action_space = env.observation_space, env.action_space
        if observation_space != self.observation_space:
            raise ConfigError("env.observation_space", observation_space,
                              f"the agent's observation space {self.observation_space}")
        if action_space != self.action_space:
            raise ConfigError("env.action_space", action_space,
                              f"the agent's action space {self.action_space}")

    def _copy_count(self, env: gym.Env | VectorEnv, resolved: Any) -> int:
        """C, the number of env copies (see the module docstring)."""
        if isinstance(env, VectorEnv):
            wanted = self.hyperparameters.n_envs  # the user's, not the task kind's
            if wanted is not None and wanted != env.num_envs:
                raise ConfigError("n_envs", wanted, f"None or {env.num_envs}, the vector env's "
                                  "num_envs")
            return env.num_envs
        return 1 if resolved.n_envs is None else resolved.n_envs

    def _training_env(self, env: gym.Env | VectorEnv, copies: int,
                      seed: int) -> tuple[Any, list[Any]]:
        """(SB3 vector env of the copies, what to close after learning)."""
        from stable_baselines3.common.monitor import Monitor
        from stable_baselines3.common.vec_env import DummyVecEnv

        reset_seeds, _ = copy_seeds(seed, copies)
        native = native_vector_spec(env)
        if native is not None:
            spec, task_kwargs = native
            vector_env = gym.make_vec(spec, num_envs=copies,
                                      vectorization_mode="vector_entry_point", **task_kwargs)
            return batched_task_copies(vector_env, reset_seeds), [vector_env]
        singles = single_copies(env, copies)
        vec_env = DummyVecEnv([
            (lambda e=single, s=s: Monitor(FirstResetSeed(e, s)))
            for single, s in zip(singles, reset_seeds, strict=True)])
        return vec_env, [single for single in singles if single is not env]

    def learn(self, env: gym.Env | VectorEnv, total_steps: int, seed: int,
              logger: Logger | None = None) -> DeepAgent:
        """Train for ``total_steps`` env steps (summed over copies) with SB3.

        A second call continues training the same model on ``env``.
        """
        total_steps = check_total_steps(total_steps)
        seed = check_seed("seed", seed)
        logger = NullLogger() if logger is None else logger
        self._check_env_spaces(env)
        _set_torch_threads(self.hyperparameters.torch_threads)

        core = task_core(env)
        need_names = tuple(core.need_names) if core is not None else None
        resolved = self.resolved_hyperparameters
        if resolved is None:
            resolved = resolve_hyperparameters(self.name, self.hyperparameters, task_kind(env))
        copies = self._copy_count(env, resolved)
        resolved = dataclasses.replace(resolved, n_envs=copies)
        if self.model is not None and copies != self.model.n_envs:
            raise ConfigError("env copies", copies,
                              f"{self.model.n_envs}, the copies this model learned with "
                              "(continued learning keeps the number of copies)")
        vec_env, to_close = self._training_env(env, copies, seed)
        if self.normalisation is None and (resolved.normalise_observations
                                           or resolved.normalise_rewards):
            self.normalisation = Normalisation(bool(resolved.normalise_observations),
                                               bool(resolved.normalise_rewards))
        if self.normalisation is not None:
            vec_env = self.normalisation.wrap(vec_env, resolved.gamma)
        tensorboard_dir = getattr(logger, "tensorboard_dir", None)
        if self.model is None:
            self.model = self._algorithm_class()(
                self._policy(), vec_env, seed=seed, device="cpu",
                verbose=resolved.verbose,
                tensorboard_log=None if tensorboard_dir is None else str(tensorboard_dir),
                policy_kwargs={"net_arch": list(resolved.net_arch)},
                **self._algorithm_arguments(resolved))
            self.resolved_hyperparameters = resolved
        else:
            self.model.set_env(vec_env)
            self.model.set_random_seed(seed)
            if tensorboard_dir is not None:
                self.model.tensorboard_log = str(tensorboard_dir)
        callback_class, _ = _callback_classes()
        if total_steps > 0:
            self.model.learn(total_timesteps=total_steps,
                             callback=callback_class(logger, need_names),
                             log_interval=self.log_interval, tb_log_name=self.name,
                             reset_num_timesteps=False, progress_bar=False)
        if self.normalisation is not None:
            self.normalisation.take_statistics(vec_env)
        for opened in to_close:  # copies made here; the caller's env stays open
            opened.close()
        return self

    def act(self, observations: Any, deterministic: bool = True) -> np.ndarray:
        """Actions (B, ...) for observations (B, ...) (one unbatched observation gives B = 1)."""
        if self.model is None:
            raise RuntimeError(f"call learn(env) (or load a saved {self.name} agent) before act()")
        if isinstance(observations, Mapping):
            single = all(np.ndim(observations[key]) == len(space.shape)
                         for key, space in self.observation_space.spaces.items())
            batch = {key: (np.asarray(value)[None] if single else np.asarray(value))
                     for key, value in observations.items()}
        else:
            observations = np.asarray(observations)
            single = observations.ndim == len(self.observation_space.shape)
            batch = observations[None] if single else observations
        if self.normalisation is not None:
            batch = self.normalisation.scale(batch)
        actions, _ = self.model.predict(batch, deterministic=deterministic)
        return np.asarray(actions)

    def _get_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        if self.model is None:
            return {"learned": False}, {}
        sb3 = import_stable_baselines3(self.name)
        buffer = io.BytesIO()
        self.model.save(buffer)
        meta = {"learned": True, "stable_baselines3": sb3.__version__,
                "num_timesteps": int(self.model.num_timesteps),
                "resolved_hyperparameters": dataclasses.asdict(self.resolved_hyperparameters)}
        arrays = {"sb3_model": np.frombuffer(buffer.getvalue(), dtype=np.uint8)}
        if self.normalisation is not None:
            meta["normalisation"], statistics = self.normalisation.state()
            arrays.update({f"normalisation/{k}": v for k, v in statistics.items()})
        return meta, arrays

    def _set_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        if not meta.get("learned"):
            return
        if "sb3_model" not in arrays:
            raise ConfigError("state", sorted(arrays), "an array 'sb3_model' (the SB3 zip)")
        _set_torch_threads(self.hyperparameters.torch_threads)
        data = io.BytesIO(np.asarray(arrays["sb3_model"], dtype=np.uint8).tobytes())
        self.model = self._algorithm_class().load(data, device="cpu")
        resolved = meta.get("resolved_hyperparameters")
        if resolved is not None:
            self.resolved_hyperparameters = build_hyperparameters(
                type(self).Hyperparameters, resolved, self.name)
        if meta.get("normalisation") is not None:
            prefix = "normalisation/"
            self.normalisation = Normalisation.restore(
                meta["normalisation"],
                {k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)})


class PPOAgent(DeepAgent):
    """Proximal policy optimisation (Schulman et al. 2017) through SB3's ``PPO``."""

    name = "ppo"
    Hyperparameters = PPOHyperparameters
    algorithm = "PPO"
    action_kinds = (spaces.Discrete, spaces.MultiDiscrete, spaces.MultiBinary, spaces.Box)

    def _algorithm_arguments(self, hp: PPOHyperparameters) -> dict[str, Any]:
        return dict(learning_rate=hp.learning_rate, n_steps=hp.n_steps,
                    batch_size=hp.batch_size, n_epochs=hp.n_epochs, gamma=hp.gamma,
                    gae_lambda=hp.gae_lambda, clip_range=hp.clip_range, ent_coef=hp.ent_coef,
                    vf_coef=hp.vf_coef, max_grad_norm=hp.max_grad_norm)


class A2CAgent(DeepAgent):
    """Advantage actor-critic (Mnih et al. 2016, synchronous) through SB3's ``A2C``."""

    name = "a2c"
    Hyperparameters = A2CHyperparameters
    algorithm = "A2C"
    action_kinds = (spaces.Discrete, spaces.MultiDiscrete, spaces.MultiBinary, spaces.Box)
    log_interval = 10

    def _algorithm_arguments(self, hp: A2CHyperparameters) -> dict[str, Any]:
        return dict(learning_rate=hp.learning_rate, n_steps=hp.n_steps, gamma=hp.gamma,
                    gae_lambda=hp.gae_lambda, ent_coef=hp.ent_coef, vf_coef=hp.vf_coef,
                    max_grad_norm=hp.max_grad_norm)


class DQNAgent(DeepAgent):
    """Deep Q-network (Mnih et al. 2015) through SB3's ``DQN``; Discrete actions only."""

    name = "dqn"
    Hyperparameters = DQNHyperparameters
    algorithm = "DQN"
    action_kinds = (spaces.Discrete,)

    def _algorithm_arguments(self, hp: DQNHyperparameters) -> dict[str, Any]:
        return dict(learning_rate=hp.learning_rate, buffer_size=hp.buffer_size,
                    learning_starts=hp.learning_starts, batch_size=hp.batch_size,
                    gamma=hp.gamma, train_freq=hp.train_freq, gradient_steps=hp.gradient_steps,
                    target_update_interval=hp.target_update_interval,
                    exploration_fraction=hp.exploration_fraction,
                    exploration_final_eps=hp.exploration_final_eps)


class SACAgent(DeepAgent):
    """Soft actor-critic (Haarnoja et al. 2018) through SB3's ``SAC``; Box actions only."""

    name = "sac"
    Hyperparameters = SACHyperparameters
    algorithm = "SAC"
    action_kinds = (spaces.Box,)

    def _algorithm_arguments(self, hp: SACHyperparameters) -> dict[str, Any]:
        return dict(learning_rate=hp.learning_rate, buffer_size=hp.buffer_size,
                    learning_starts=hp.learning_starts, batch_size=hp.batch_size, tau=hp.tau,
                    gamma=hp.gamma, train_freq=hp.train_freq, gradient_steps=hp.gradient_steps,
                    ent_coef=hp.ent_coef)
