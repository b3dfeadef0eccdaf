"""The protocol every needbench agent follows, and the agent file format.

An agent is built from one copy's observation and action spaces plus keyword
hyperparameters, learns with ``learn(env, total_steps, seed, logger)``, acts
with ``act`` on a batch of observations (B, ...) or on one observation (then
it returns one action, as Stable-Baselines3's ``predict`` does), and is
written to and read from disk with ``save`` and ``load``.

Every agent learns on a task's native vector env: :func:`learning_env` makes
it with the copies the agent asks for (:meth:`Agent.learning_copies`) and the
autoreset mode it steps in (:attr:`Agent.autoreset_mode`). ``learn`` also
takes a single env (a batch of one copy).

Agent file format (version 1)
-----------------------------
One compressed ``.npz`` archive (``numpy.savez_compressed``) holding no
pickled objects, so ``numpy.load(path, allow_pickle=False)`` reads it:

* ``header``: a 0-d unicode array holding one JSON object::

      {"format": "needbench-agent", "format_version": 1,
       "agent": "<registry name>",
       "hyperparameters": {...},            # the agent's hyperparameter dataclass
       "observation_space": {...}, "action_space": {...},   # see encode_space
       "state": {...}}                      # small JSON-able learned state
* ``space/observation/<field>`` and ``space/action/<field>``: bounds and sizes
  of the two spaces (Box ``low``/``high``, MultiDiscrete ``nvec``/``start``);
* ``state/<name>``: the learned arrays (Q-tables, values, policies...).

``Agent.load`` rebuilds the agent from the header with the same constructor a
user calls, then puts the learned state back, so a loaded agent acts exactly as
the saved one did.

Seeding convention
------------------
Gymnasium's, everywhere: a vector env reset with ``seed=s`` seeds copy j with
``s + j`` (:func:`copy_seeds`; ``NeedVectorEnv.reset`` and Gymnasium's
``SyncVectorEnv`` do exactly this with an int seed). A learning run with seed
``s`` over C copies resets them with ``seed=s``; a batched learner's
exploration stream of copy j is keyed by :func:`exploration_keys`, a function
of ``s + j`` alone. Copy j of seed s therefore sees the same world whether it
learns alone or beside other seeds in one wide vector env.
"""

from __future__ import annotations

import abc
import dataclasses
import difflib
import json
import os
import tempfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any, ClassVar, Protocol, runtime_checkable

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, SyncVectorEnv, VectorEnv

from needbench.envs.errors import ConfigError
from needbench.envs.streams import key_from

FILE_FORMAT = "needbench-agent"
FILE_FORMAT_VERSION = 1


class NotApplicableError(ConfigError):
    """This agent does not handle this kind of task: its spaces, or a model it needs.

    Raised when an agent is built for, or asked to learn on, a task outside its
    reach (a Box action space for tabular-q, a task without a finite model for
    the exact planner...). A suite runner skips such pairs and lists them; any
    other error of a job is recorded as a failure.
    """


@runtime_checkable
class Logger(Protocol):
    """Receives scalar curves during learning (TensorBoard writers fit this)."""

    def log_scalar(self, tag: str, value: float, step: int) -> None: ...


class NullLogger:
    """A logger that drops everything (the default when none is given)."""

    def log_scalar(self, tag: str, value: float, step: int) -> None:
        return None


# --- hyperparameters -----------------------------------------------------------


def build_hyperparameters(schema: type, given: Mapping[str, Any], agent_name: str):
    """An instance of the agent's hyperparameter dataclass from keyword values.

    Unknown names raise ConfigError with the nearest known name; the dataclass's
    own ``__post_init__`` checks the values.
    """
    known = [f.name for f in dataclasses.fields(schema)]
    for key, value in given.items():
        if key not in known:
            near = difflib.get_close_matches(key, known, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            allowed = ", ".join(known) if known else "none (this agent has no hyperparameters)"
            raise ConfigError(f"{agent_name}.{key}", value, f"a hyperparameter among {allowed}"
                              + hint)
    return schema(**given)


@dataclasses.dataclass(frozen=True)
class NoHyperparameters:
    """For agents without hyperparameters."""


# --- the protocol --------------------------------------------------------------


class Agent(abc.ABC):
    """Abstract base of every needbench agent.

    Subclasses set ``name`` (the registry name) and ``Hyperparameters`` (a
    frozen dataclass with defaults), and implement ``learn`` and ``act``. To be
    saved they override ``_get_state``/``_set_state``.
    """

    name: ClassVar[str] = ""
    Hyperparameters: ClassVar[type] = NoHyperparameters
    #: How the vector env this agent learns on autoresets (Gymnasium's modes).
    autoreset_mode: ClassVar[AutoresetMode] = AutoresetMode.NEXT_STEP
    #: Whether ``learn`` learns from env steps. False for agents whose ``learn`` only
    #: reads the task (a model, a seed) and ignores ``total_steps``.
    learns_from_experience: ClassVar[bool] = True

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space,
                 **hyperparameters: Any):
        if not isinstance(observation_space, spaces.Space):
            raise ConfigError("observation_space", observation_space, "a gymnasium Space")
        if not isinstance(action_space, spaces.Space):
            raise ConfigError("action_space", action_space, "a gymnasium Space")
        self.observation_space = observation_space
        self.action_space = action_space
        self.hyperparameters = build_hyperparameters(type(self).Hyperparameters,
                                                     hyperparameters, self.name)

    @abc.abstractmethod
    def learn(self, env: gym.Env | VectorEnv, total_steps: int, seed: int,
              logger: Logger | None = None) -> Agent:
        """Learn from ``env`` for ``total_steps`` env steps (summed over copies); returns self."""

    def learning_copies(self, env: gym.Env | VectorEnv) -> int:
        """How many copies of ``env``'s task this agent learns on (:data:`LEARNING_COPIES`)."""
        return LEARNING_COPIES

    def check_env(self, env: gym.Env | VectorEnv) -> None:
        """Raise ConfigError if this agent, as configured, cannot learn on ``env``.

        Called by ``learn`` and, on a one-copy env, when a suite is loaded, so
        that a setting that only fails against a task's spaces (an oversized
        table, a missing model) is reported before anything runs. Raises
        :class:`NotApplicableError` for a task outside the agent's reach.
        """
        observation_space, action_space = env_spaces(env)
        if action_space != self.action_space:
            raise ConfigError("env.action_space", action_space,
                              f"the agent's action space {self.action_space}")
        if type(observation_space) is not type(self.observation_space) or getattr(
                observation_space, "shape", None) != getattr(self.observation_space, "shape",
                                                             None):
            raise ConfigError("env.observation_space", observation_space,
                              f"the agent's observation space {self.observation_space}")

    def act(self, observations: Any, deterministic: bool = True) -> Any:
        """Actions (B, ...) for a batch of observations (B, ...), or one action for one
        observation (unbatched, of the observation space's shape)."""
        batch, single = as_batch(self.observation_space, observations)
        actions = self._act(batch, deterministic)
        return actions[0] if single else actions

    @abc.abstractmethod
    def _act(self, observations: Any, deterministic: bool) -> np.ndarray:
        """Actions (B, ...) for a batch of observations (B, ...)."""

    # --- persistence -----------------------------------------------------------

    def _get_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """(JSON-able metadata, named arrays) that together hold what was learned."""
        return {}, {}

    def _set_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        """Put back what ``_get_state`` returned (default: an agent that learns nothing)."""
        if arrays:
            raise ConfigError("state", sorted(arrays), f"no learned arrays for {self.name!r}")

    def save(self, path: str | os.PathLike) -> None:
        """Write the agent to ``path`` in the agent file format (module docstring)."""
        meta, state = self._get_state()
        observation_record, observation_arrays = encode_space(self.observation_space,
                                                              "observation_space")
        action_record, action_arrays = encode_space(self.action_space, "action_space")
        header = {
            "format": FILE_FORMAT,
            "format_version": FILE_FORMAT_VERSION,
            "agent": self.name,
            "hyperparameters": dataclasses.asdict(self.hyperparameters),
            "observation_space": observation_record,
            "action_space": action_record,
            "state": meta,
        }
        try:
            text = json.dumps(header, allow_nan=False)
        except (TypeError, ValueError) as error:
            raise ConfigError("hyperparameters", header["hyperparameters"],
                              f"finite JSON-able values ({error})") from error
        arrays: dict[str, np.ndarray] = {"header": np.array(text)}
        arrays.update({f"space/observation/{k}": v for k, v in observation_arrays.items()})
        arrays.update({f"space/action/{k}": v for k, v in action_arrays.items()})
        arrays.update({f"state/{k}": np.asarray(v) for k, v in state.items()})
        path = Path(path)
        # Write beside the target and rename, so a crash never leaves half a file.
        handle, temporary = tempfile.mkstemp(dir=path.parent, suffix=".partial")
        try:
            with os.fdopen(handle, "wb") as stream:
                np.savez_compressed(stream, **arrays)
            os.replace(temporary, path)
        except BaseException:
            if os.path.exists(temporary):
                os.remove(temporary)
            raise

    @classmethod
    def load(cls, path: str | os.PathLike) -> Agent:
        """Read an agent file. ``Agent.load`` dispatches on the stored registry name;
        ``SomeAgent.load`` also checks that the file holds that agent."""
        header, arrays = read_agent_file(path)
        stored = header["agent"]
        if cls is Agent:
            from needbench.agents.registry import AGENTS  # the registry imports this module

            if stored not in AGENTS:
                raise ConfigError(f"{path}: agent", stored, "a registered agent name")
            target = AGENTS[stored]
        else:
            if stored != cls.name:
                raise ConfigError(f"{path}: agent", stored, f"{cls.name!r} (use Agent.load "
                                  "to read any agent)")
            target = cls
        observation_space = decode_space(header["observation_space"], arrays, "observation")
        action_space = decode_space(header["action_space"], arrays, "action")
        agent = target(observation_space, action_space, **header["hyperparameters"])
        state = {k[len("state/"):]: v for k, v in arrays.items() if k.startswith("state/")}
        agent._set_state(header["state"], state)
        return agent


def read_agent_file(path: str | os.PathLike) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """(header, arrays) of an agent file; ConfigError if it is not one."""
    allowed = f"a {FILE_FORMAT} file (format version {FILE_FORMAT_VERSION}) written by Agent.save"
    try:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {key: archive[key] for key in archive.files}
    except (OSError, ValueError) as error:
        raise ConfigError("path", str(path), allowed) from error
    try:
        header = json.loads(str(arrays.pop("header")))
    except (KeyError, ValueError) as error:
        raise ConfigError("path", str(path), allowed) from error
    if header.get("format") != FILE_FORMAT or header.get("format_version") != FILE_FORMAT_VERSION:
        raise ConfigError("path", str(path), allowed)
    return header, arrays


# --- spaces on disk --------------------------------------------------------------


def encode_space(space: spaces.Space, path: str) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """(JSON record, arrays) describing a Discrete, MultiDiscrete, MultiBinary or Box space."""
    if isinstance(space, spaces.Discrete):
        return {"type": "Discrete", "n": int(space.n), "start": int(space.start)}, {}
    if isinstance(space, spaces.MultiDiscrete):
        return ({"type": "MultiDiscrete", "dtype": str(space.dtype)},
                {"nvec": np.asarray(space.nvec), "start": np.asarray(space.start)})
    if isinstance(space, spaces.MultiBinary):
        return {"type": "MultiBinary", "n": np.asarray(space.n).tolist()}, {}
    if isinstance(space, spaces.Box):
        return ({"type": "Box", "dtype": str(space.dtype)},
                {"low": np.asarray(space.low), "high": np.asarray(space.high)})
    raise ConfigError(path, space, "a Discrete, MultiDiscrete, MultiBinary or Box space")


def decode_space(record: Mapping[str, Any], arrays: Mapping[str, np.ndarray],
                 role: str) -> spaces.Space:
    """The space written by :func:`encode_space`."""
    kind = record.get("type")
    prefix = f"space/{role}/"
    if kind == "Discrete":
        return spaces.Discrete(record["n"], start=record["start"])
    if kind == "MultiDiscrete":
        return spaces.MultiDiscrete(arrays[prefix + "nvec"], dtype=record["dtype"],
                                    start=arrays[prefix + "start"])
    if kind == "MultiBinary":
        return spaces.MultiBinary(record["n"])
    if kind == "Box":
        return spaces.Box(arrays[prefix + "low"], arrays[prefix + "high"],
                          dtype=np.dtype(record["dtype"]))
    raise ConfigError(f"{role}_space.type", kind, "Discrete, MultiDiscrete, MultiBinary or Box")


# --- batched stepping --------------------------------------------------------------


#: Copies of the task's native vector env an agent learns on unless it asks otherwise.
LEARNING_COPIES = 8


def make_task_vector_env(task_id: str, copies: int, autoreset_mode: AutoresetMode,
                         task_kwargs: Mapping[str, Any] | None = None) -> VectorEnv:
    """The native vector env of a registered needbench task: ``copies`` copies."""
    return gym.make_vec(task_id, num_envs=copies, vectorization_mode="vector_entry_point",
                        autoreset_mode=autoreset_mode, **dict(task_kwargs or {}))


def learning_env(agent: Agent, task_id: str,
                 task_kwargs: Mapping[str, Any] | None = None) -> VectorEnv:
    """The vector env ``agent`` learns on: the task's native vector env with
    ``agent.learning_copies`` copies, in ``agent.autoreset_mode``."""
    probe = make_task_vector_env(task_id, 1, agent.autoreset_mode, task_kwargs)
    copies = agent.learning_copies(probe)
    if copies == 1:
        return probe
    probe.close()
    return make_task_vector_env(task_id, copies, agent.autoreset_mode, task_kwargs)


def env_spaces(env: gym.Env | VectorEnv) -> tuple[spaces.Space, spaces.Space]:
    """One copy's (observation space, action space) of a single or vector env."""
    if isinstance(env, VectorEnv):
        return env.single_observation_space, env.single_action_space
    return env.observation_space, env.action_space


def as_vector_env(env: gym.Env | VectorEnv,
                  mode: AutoresetMode = AutoresetMode.NEXT_STEP) -> VectorEnv:
    """A vector env view of ``env``: itself if it already is one, else a batch of one copy.

    The single env is wrapped in Gymnasium's SyncVectorEnv (autoreset in
    ``mode``), so learners have one batched code path. Closing the wrapper
    closes ``env``. A vector env must already autoreset in ``mode``.
    """
    if isinstance(env, VectorEnv):
        require_autoreset(env, mode)
        return env
    if isinstance(env, gym.Env):
        return SyncVectorEnv([lambda: env], autoreset_mode=mode)
    raise ConfigError("env", env, "a gymnasium.Env or a gymnasium.vector.VectorEnv")


def autoreset_mode(env: VectorEnv) -> AutoresetMode:
    """The vector env's autoreset mode (Gymnasium's default, NEXT_STEP, if it declares none)."""
    mode = env.metadata.get("autoreset_mode", AutoresetMode.NEXT_STEP)
    return mode if isinstance(mode, AutoresetMode) else AutoresetMode(mode)


def require_autoreset(env: VectorEnv, mode: AutoresetMode) -> None:
    """Raise unless ``env`` autoresets in ``mode``."""
    given = autoreset_mode(env)
    if given != mode:
        raise ConfigError("env.metadata['autoreset_mode']", given,
                          f"{mode} (make the vector env with autoreset_mode={mode}, e.g. "
                          "needbench.agents.base.learning_env(agent, task_id))")


def require_next_step_autoreset(env: VectorEnv) -> None:
    """Raise unless ``env`` autoresets in next-step mode (what the batched learners assume)."""
    require_autoreset(env, AutoresetMode.NEXT_STEP)


def single_unwrapped(env: gym.Env | VectorEnv) -> Any:
    """The innermost single env behind ``env`` (copy 0 of a SyncVectorEnv), or the
    native vector env itself (which carries the task core)."""
    if isinstance(env, VectorEnv):
        copies = getattr(env.unwrapped, "envs", None)
        if copies:
            return copies[0].unwrapped
        return env.unwrapped
    return env.unwrapped


def task_core(env: gym.Env | VectorEnv) -> Any | None:
    """The needbench task core behind ``env`` (``env.unwrapped.core``), or None."""
    return getattr(single_unwrapped(env), "core", None)


def batch_size(observations: Any) -> int:
    """B, the leading axis of a batch of observations (array or dict of arrays)."""
    if isinstance(observations, Mapping):
        return batch_size(next(iter(observations.values())))
    return int(np.shape(observations)[0])


def as_batch(space: spaces.Space, observations: Any) -> tuple[Any, bool]:
    """(a batch (B, ...) of observations, whether one unbatched observation was given).

    One observation has the space's own shape (a Dict space: every entry has
    its sub-space's shape); a batch has one more, leading axis. Anything
    else raises ConfigError naming both forms.
    """
    if isinstance(space, spaces.Dict):
        if not isinstance(observations, Mapping) or set(observations) != set(space.spaces):
            raise ConfigError("observations", type(observations).__name__,
                              f"a dict with the keys {sorted(space.spaces)}")
        depth = {key: np.ndim(observations[key]) - len(space.spaces[key].shape)
                 for key in space.spaces}
        if set(depth.values()) == {0}:
            return {key: np.asarray(value)[None] for key, value in observations.items()}, True
        if set(depth.values()) == {1}:
            return {key: np.asarray(value) for key, value in observations.items()}, False
        shapes = {key: np.shape(value) for key, value in observations.items()}
        raise ConfigError("observations", shapes, "one observation, "
                          f"{ {k: s.shape for k, s in space.spaces.items()} }, or a batch of "
                          "them with one leading axis")
    shape = tuple(space.shape) if space.shape is not None else ()
    array = np.asarray(observations)
    if array.ndim == len(shape) and array.shape == shape:
        return array[None], True
    if array.ndim == len(shape) + 1 and array.shape[1:] == shape:
        return array, False
    raise ConfigError("observations", f"an array of shape {array.shape}",
                      f"one observation of shape {shape} or a batch of shape (B, *{shape})")


# --- seeding ------------------------------------------------------------------------


#: The largest seed: NumPy's legacy seeding (which Stable-Baselines3 calls) takes < 2**32.
MAX_SEED = 2**32 - 1


def check_seed(path: str, seed: Any) -> int:
    """A seed is a whole number in [0, MAX_SEED]."""
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) \
            or not 0 <= seed <= MAX_SEED:
        raise ConfigError(path, seed, f"a whole number in [0, {MAX_SEED}]")
    return int(seed)


def check_total_steps(total_steps: Any) -> int:
    if (isinstance(total_steps, (bool, np.bool_)) or not isinstance(total_steps, (int, np.integer))
            or total_steps < 0):
        raise ConfigError("total_steps", total_steps, "a whole number >= 0")
    return int(total_steps)


#: Second entropy word of the exploration streams, so they never equal an env's stream.
EXPLORATION_STREAM = 0x65_78_70_6C  # "expl" in ASCII


def copy_seeds(seed: int, copies: int) -> list[int]:
    """The reset seeds of C copies run with ``seed``: ``seed + j`` for copy j.

    Gymnasium's convention, which ``VectorEnv.reset(seed=seed)`` applies
    itself; this function is for code that must name the seeds (a list of
    seeds for several runs side by side, the exploration streams).
    """
    seed = check_seed("seed", seed)
    return [seed + j for j in range(int(copies))]


def exploration_keys(seed: int, copies: int) -> np.ndarray:
    """(C,) uint64 keys of the copies' exploration streams: copy j's from ``seed + j`` alone."""
    return np.array([key_from(np.random.default_rng([copy_seed, EXPLORATION_STREAM]))
                     for copy_seed in copy_seeds(seed, copies)], dtype=np.uint64)
