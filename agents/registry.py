"""The agent registry: one line per agent, classes imported only when asked for.

Each entry maps a registry name to ``"module:Class"``. Nothing is imported until
an agent is looked up, so the registry (and every NumPy agent) works without
torch installed; only asking for a deep agent imports its module. To add an
agent, add one line to ``_ENTRIES`` (or call :func:`register_agent` from a
plug-in).
"""

from __future__ import annotations

import difflib
import importlib
from collections.abc import Iterator, Mapping
from typing import Any

from gymnasium import spaces

from needbench.agents.base import Agent
from needbench.envs.errors import ConfigError

_ENTRIES: dict[str, str | type[Agent]] = {
    "random": "needbench.agents.random_agent:RandomAgent",
    "exact-planner": "needbench.agents.planner:ExactPlannerAgent",
    "tabular-q": "needbench.agents.tabular:TabularQAgent",
    "setpoint-controller": "needbench.agents.controller:SetpointController",
    "ppo": "needbench.agents.deep:PPOAgent",
    "a2c": "needbench.agents.deep:A2CAgent",
    "dqn": "needbench.agents.deep:DQNAgent",
    "sac": "needbench.agents.deep:SACAgent",
}


class AgentRegistry(Mapping[str, type[Agent]]):
    """Read-only mapping from registry name to agent class, resolved lazily.

    ``name in AGENTS`` and ``list(AGENTS)`` never import an agent's module;
    ``AGENTS[name]`` imports it (once) and raises ImportError naming the
    missing optional dependency when it is not installed.
    """

    def __init__(self, entries: dict[str, str | type[Agent]]):
        self._entries = entries

    def __getitem__(self, name: str) -> type[Agent]:
        target = self._entries[name]
        if isinstance(target, str):
            module_name, _, class_name = target.partition(":")
            try:
                module = importlib.import_module(module_name)
            except ImportError as error:
                raise ImportError(
                    f"agent {name!r} needs {error.name or 'a missing package'!r}; deep agents "
                    "need the 'deep' extra of needbench") from error
            target = getattr(module, class_name)
            if not (isinstance(target, type) and issubclass(target, Agent)):
                raise TypeError(f"{module_name}:{class_name} is not an Agent subclass")
            if target.name != name:
                raise TypeError(f"{module_name}:{class_name}.name is {target.name!r}, "
                                f"registered as {name!r}")
            self._entries[name] = target
        return target

    def __iter__(self) -> Iterator[str]:
        return iter(self._entries)

    def __len__(self) -> int:
        return len(self._entries)

    def __contains__(self, name: object) -> bool:
        return name in self._entries


AGENTS = AgentRegistry(_ENTRIES)


def register_agent(name: str, target: str | type[Agent]) -> None:
    """Add an agent under ``name``: a class or a lazy ``"module:Class"`` string."""
    if not isinstance(name, str) or not name:
        raise ConfigError("agent name", name, "a non-empty string")
    if name in _ENTRIES:
        raise ConfigError("agent name", name, "a name not yet registered: "
                          + ", ".join(sorted(_ENTRIES)))
    if isinstance(target, str):
        if ":" not in target:
            raise ConfigError(f"agents.{name}", target, "'module:Class'")
    elif not (isinstance(target, type) and issubclass(target, Agent)):
        raise ConfigError(f"agents.{name}", target, "an Agent subclass or 'module:Class'")
    _ENTRIES[name] = target


def check_agent_name(name: Any) -> str:
    """``name`` if it is registered, else ConfigError suggesting the nearest name."""
    if isinstance(name, str) and name in AGENTS:
        return name
    names = sorted(AGENTS)
    near = difflib.get_close_matches(name, names, n=1) if isinstance(name, str) else []
    hint = f" (did you mean {near[0]!r}?)" if near else ""
    raise ConfigError("agent", name, "one of " + ", ".join(repr(n) for n in names) + hint)


def make_agent(name: str, observation_space: spaces.Space, action_space: spaces.Space,
               **hyperparameters: Any) -> Agent:
    """A new agent of registry ``name`` for one copy's spaces.

    Raises ConfigError for an unknown name (suggesting the nearest) or an
    unknown or invalid hyperparameter.
    """
    cls = AGENTS[check_agent_name(name)]
    return cls(observation_space, action_space, **hyperparameters)
