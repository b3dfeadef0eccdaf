"""The deep agents' classes: :class:`DeepAgent` and PPO, A2C, DQN, SAC over Stable-Baselines3.

See :mod:`needbench.agents.deep` for what they do; hyperparameters live in
:mod:`~needbench.agents.deep.hyperparameters`, the bridge to SB3's vector env
in :mod:`~needbench.agents.deep.vec_env`.
"""

from __future__ import annotations

import dataclasses
import io
import warnings
from collections.abc import Mapping
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv

from needbench.agents.base import (
    Agent,
    Logger,
    NotApplicableError,
    NullLogger,
    as_vector_env,
    build_hyperparameters,
    check_seed,
    check_total_steps,
    task_core,
)
from needbench.agents.curves import scoring_discount
from needbench.agents.deep.hyperparameters import (
    A2CHyperparameters,
    DQNHyperparameters,
    PPOHyperparameters,
    SACHyperparameters,
    algorithm_arguments,
    resolve_hyperparameters,
    task_kind,
)
from needbench.agents.deep.normalisation import Normalisation
from needbench.agents.deep.vec_env import stable_logger, stable_vec_env
from needbench.envs.errors import ConfigError


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


class UntrustedFileWarning(UserWarning):
    """Loading this file runs code stored in it (pickled objects)."""


class DeepAgent(Agent):
    """Common adapter: SB3 model, the vector env as SB3's, logging and the agent file.

    Subclasses set ``name``, ``Hyperparameters``, ``algorithm`` (the SB3 class
    name) and ``action_kinds`` (allowed action space types). The SB3
    constructor keywords come from the dataclass
    (:func:`~needbench.agents.deep.hyperparameters.algorithm_arguments`).
    """

    algorithm: ClassVar[str] = ""
    action_kinds: ClassVar[tuple[type[spaces.Space], ...]] = (spaces.Space,)
    log_interval: ClassVar[int] = 1
    autoreset_mode = AutoresetMode.SAME_STEP

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

    def _policy(self) -> str:
        return "MultiInputPolicy" if isinstance(self.observation_space, spaces.Dict) \
            else "MlpPolicy"

    def _resolved(self, env: gym.Env | VectorEnv) -> Any:
        if self.resolved_hyperparameters is not None:
            return self.resolved_hyperparameters
        return resolve_hyperparameters(self.name, self.hyperparameters, task_kind(env))

    def learning_copies(self, env: gym.Env | VectorEnv) -> int:
        """``n_envs``, or the task kind's number of copies (1 where the table gives none)."""
        if self.model is not None:
            return int(self.model.n_envs)  # continued learning keeps the number of copies
        copies = self._resolved(env).n_envs
        return 1 if copies is None else int(copies)

    def learn(self, env: gym.Env | VectorEnv, total_steps: int, seed: int,
              logger: Logger | None = None) -> DeepAgent:
        """Train for ``total_steps`` env steps (summed over copies) with SB3.

        ``env`` is a vector env in same-step autoreset (see
        :func:`needbench.agents.base.learning_env`) or a single env (one copy).
        A second call continues training the same model on ``env``.
        """
        total_steps = check_total_steps(total_steps)
        seed = check_seed("seed", seed)
        logger = NullLogger() if logger is None else logger
        vector_env = as_vector_env(env, AutoresetMode.SAME_STEP)
        self.check_env(vector_env)
        _set_torch_threads(self.hyperparameters.torch_threads)

        core = task_core(vector_env)
        need_names = tuple(core.need_names) if core is not None else None
        copies = vector_env.num_envs
        wanted = self.hyperparameters.n_envs  # the user's, not the task kind's
        if wanted is not None and wanted != copies:
            raise ConfigError("n_envs", wanted, f"None or {copies}, the env's number of copies "
                              "(learning_env(agent, task_id) makes as many as n_envs)")
        if self.model is not None and copies != self.model.n_envs:
            raise ConfigError("env copies", copies,
                              f"{self.model.n_envs}, the copies this model learned with "
                              "(continued learning keeps the number of copies)")
        resolved = dataclasses.replace(self._resolved(vector_env), n_envs=copies)
        vec_env = stable_vec_env(vector_env, seed, logger, scoring_discount(logger), need_names,
                                 0 if self.model is None else self.model.num_timesteps)
        if self.normalisation is None and (resolved.normalise_observations
                                           or resolved.normalise_rewards):
            self.normalisation = Normalisation(bool(resolved.normalise_observations),
                                               bool(resolved.normalise_rewards))
        if self.normalisation is not None:
            vec_env = self.normalisation.wrap(vec_env, resolved.gamma)
        if self.model is None:
            self.model = self._algorithm_class()(
                self._policy(), vec_env, seed=seed, device="cpu", verbose=resolved.verbose,
                policy_kwargs={"net_arch": list(resolved.net_arch)},
                **algorithm_arguments(resolved))
            self.resolved_hyperparameters = resolved
        else:
            self.model.set_env(vec_env)
            self.model.set_random_seed(seed)
        # SB3's own logger writes nothing of its own into the run: the optimiser's
        # figures reach the needbench logger as update/<name>.
        self.model.set_logger(stable_logger(logger, resolved.verbose))
        if total_steps > 0:
            self.model.learn(total_timesteps=total_steps, log_interval=self.log_interval,
                             reset_num_timesteps=False, progress_bar=False)
            self.model.logger.dump(self.model.num_timesteps)  # the last partial interval
        if self.normalisation is not None:
            self.normalisation.take_statistics(vec_env)
        return self

    def _act(self, observations: Any, deterministic: bool) -> np.ndarray:
        """Actions (B, ...) for observations (B, ...)."""
        if self.model is None:
            raise RuntimeError(f"call learn(env) (or load a saved {self.name} agent) before act()")
        if self.normalisation is not None:
            observations = self.normalisation.scale(observations)
        actions, _ = self.model.predict(observations, deterministic=deterministic)
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
        warnings.warn("loading a Stable-Baselines3 model runs code stored in the file (SB3 "
                      "models hold pickled objects): load only agent files you trust",
                      UntrustedFileWarning, stacklevel=3)
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


class A2CAgent(DeepAgent):
    """Advantage actor-critic (Mnih et al. 2016, synchronous) through SB3's ``A2C``."""

    name = "a2c"
    Hyperparameters = A2CHyperparameters
    algorithm = "A2C"
    action_kinds = (spaces.Discrete, spaces.MultiDiscrete, spaces.MultiBinary, spaces.Box)
    log_interval = 10


class DQNAgent(DeepAgent):
    """Deep Q-network (Mnih et al. 2015) through SB3's ``DQN``; Discrete actions only."""

    name = "dqn"
    Hyperparameters = DQNHyperparameters
    algorithm = "DQN"
    action_kinds = (spaces.Discrete,)


class SACAgent(DeepAgent):
    """Soft actor-critic (Haarnoja et al. 2018) through SB3's ``SAC``; Box actions only."""

    name = "sac"
    Hyperparameters = SACHyperparameters
    algorithm = "SAC"
    action_kinds = (spaces.Box,)
