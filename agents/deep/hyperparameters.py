"""Hyperparameters of the deep agents: one frozen dataclass per algorithm, task-kind defaults.

Fields left at ``None`` take the value of the task kind from
:data:`KIND_DEFAULTS`: ``outcome`` tasks (non-spatial needbench tasks such as
Menu, whose consequences play out within a few steps), ``spatial`` tasks (the
agent walks to sources, so horizons are longer) and ``generic`` (any other
Gymnasium env; SB3's own defaults).

Every field is a keyword of the SB3 algorithm's constructor except the
adapter's own, :class:`AdapterSettings` (network widths, copies,
normalisation, threads, verbosity): :func:`algorithm_arguments` is the one table from a
dataclass to the SB3 keywords.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium.vector import VectorEnv

from needbench.agents.base import task_core
from needbench.envs.errors import ConfigError, check_choice, check_positive, check_range

TASK_KINDS = ("outcome", "spatial", "generic")



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


@dataclass(frozen=True)
class AdapterSettings:
    """The fields every deep agent's dataclass has, used by the adapter itself (not SB3
    keywords); an algorithm's dataclass may give one another default."""

    net_arch: tuple[int, ...] = (64, 64)  # hidden layer widths (policy and value)
    n_envs: int | None = None  # copies to learn on (None: the task kind's, else 1)
    normalise_observations: bool | None = False  # wrap the copies in VecNormalize (observations)
    normalise_rewards: bool | None = False  # wrap the copies in VecNormalize (rewards)
    torch_threads: int = 1  # torch intra-op threads of this worker
    verbose: int = 0  # SB3 verbosity (0 silent)

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
class PPOHyperparameters(AdapterSettings):
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
    normalise_observations: bool | None = None  # VecNormalize observations (None: kind's)
    normalise_rewards: bool | None = None  # VecNormalize rewards (None: task kind's)

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
class A2CHyperparameters(AdapterSettings):
    learning_rate: float = 7e-4  # RMSprop step size
    n_steps: int | None = None  # steps per copy between updates (None: task kind's)
    gamma: float | None = None  # discount (None: task kind's)
    gae_lambda: float = 1.0  # 1 = plain n-step returns
    ent_coef: float | None = None  # entropy bonus weight (None: task kind's)
    vf_coef: float = 0.5  # value loss weight
    max_grad_norm: float = 0.5  # gradient clipping

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
class DQNHyperparameters(AdapterSettings):
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
class SACHyperparameters(AdapterSettings):
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


#: The adapter's own fields (:class:`AdapterSettings`); every other field is an SB3 keyword.
ADAPTER_FIELDS = tuple(f.name for f in dataclasses.fields(AdapterSettings))


def algorithm_arguments(hyperparameters: Any) -> dict[str, Any]:
    """The SB3 constructor keywords of a (resolved) hyperparameter dataclass: every field
    but :data:`ADAPTER_FIELDS`, under its own name."""
    return {f.name: getattr(hyperparameters, f.name) for f in dataclasses.fields(hyperparameters)
            if f.name not in ADAPTER_FIELDS}
