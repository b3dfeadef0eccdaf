"""The agent registry: the built-in agents, the installed plug-ins, and imported classes.

Each built-in entry maps a registry name to ``"module:Class"``. Nothing is
imported until an agent is looked up, so the registry (and every NumPy agent)
works without torch installed; only asking for a deep agent imports its
module. To add a built-in agent, add one line to ``_ENTRIES``.

Plug-ins: an installed distribution declares agents under the entry point
group ``needbench.agents`` (name = the agent's registry name, value =
``"module:Class"``), e.g. in its ``pyproject.toml``::

    [project.entry-points."needbench.agents"]
    sip-when-dry = "thirst_lab.agents:SipWhenDry"

They are found once, on the first use of the registry
(``importlib.metadata.entry_points``), and listed beside the built-ins; the
class is imported only when the agent is asked for. A plug-in whose name is
a built-in agent's, or that two distributions declare, is left out with a
:class:`PluginWarning` naming the package. A class that does not implement
the agent protocol (a concrete subclass of :class:`~needbench.agents.base.Agent`
whose ``name`` is its registry name) is a ConfigError naming the package
when it is asked for.

A user's own class in a local module is named ``module:Class`` and is
imported only with ``allow_import=True`` (``--allow-import`` on the command
line): see :mod:`needbench.agents.imports`.
"""

from __future__ import annotations

import dataclasses
import difflib
import importlib
import importlib.metadata
import inspect
import warnings
from collections.abc import Iterator, Mapping
from typing import Any

from gymnasium import spaces

from needbench.agents.base import Agent, NoHyperparameters
from needbench.agents.imports import (
    import_user_module,
    is_import_form,
    module_root,
    require_import_allowed,
    resolve_attribute,
    split_import_form,
)
from needbench.envs.errors import ConfigError

#: The entry point group under which installed packages declare agents.
ENTRY_POINT_GROUP = "needbench.agents"

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
_BUILTIN_NAMES = frozenset(_ENTRIES)


class PluginWarning(UserWarning):
    """An installed plug-in agent is left out (a clashing name or a malformed entry point)."""


@dataclasses.dataclass(frozen=True)
class AgentSource:
    """Where a registry agent comes from.

    Attributes:
        kind: ``'built-in'``, ``'plug-in'`` (an entry point of an installed
            distribution), ``'registered'`` (:func:`register_agent`) or
            ``'import'`` (a ``module:Class`` name).
        target: ``"module:Class"`` of the class.
        package: the distribution's name (plug-ins only).
        version: the distribution's version (plug-ins only).
        folder: the ``sys.path`` folder the plug-in's distribution was found in,
            or the imported module's folder (so worker processes can import it).
    """

    kind: str
    target: str
    package: str | None = None
    version: str | None = None
    folder: str | None = None

    @property
    def label(self) -> str:
        """``thirst-lab 0.2.0`` for a plug-in; the kind otherwise."""
        if self.kind == "plug-in":
            return f"{self.package} {self.version}"
        return self.kind


_PLUGINS: dict[str, AgentSource] = {}
_REGISTERED: set[str] = set()
_discovered = False


def _distribution_folder(distribution: Any) -> str | None:
    """The sys.path folder holding an installed distribution's metadata, if it is a folder."""
    located = getattr(distribution, "locate_file", None)
    if located is None:
        return None
    try:
        return str(located(""))
    except Exception:  # a distribution that is not on the file system
        return None


def discover_plugins(*, refresh: bool = False) -> dict[str, AgentSource]:
    """The plug-in agents of the installed distributions (found once, or again with ``refresh``).

    Warns (:class:`PluginWarning`) and leaves out an entry point whose name is
    a built-in agent's, that another distribution already declared, or whose
    value is not ``module:Class``.
    """
    global _discovered
    if _discovered and not refresh:
        return _PLUGINS
    _discovered = True
    for name in list(_PLUGINS):
        if _ENTRIES.get(name) is not None and name not in _BUILTIN_NAMES:
            del _ENTRIES[name]
    _PLUGINS.clear()
    for entry in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP):
        distribution = entry.dist
        package = distribution.name if distribution is not None else "an unknown package"
        version = distribution.version if distribution is not None else "?"
        where = f"package {package} {version}"
        if entry.name in _BUILTIN_NAMES or entry.name in _REGISTERED:
            warnings.warn(f"the plug-in agent {entry.name!r} of {where} is left out: "
                          f"{entry.name!r} is the name of a built-in agent (rename the entry "
                          f"point in {package}'s [project.entry-points.\"{ENTRY_POINT_GROUP}\"])",
                          PluginWarning, stacklevel=2)
            continue
        if entry.name in _PLUGINS:
            first = _PLUGINS[entry.name]
            warnings.warn(f"the plug-in agent {entry.name!r} of {where} is left out: package "
                          f"{first.package} {first.version} already declares an agent of that "
                          "name", PluginWarning, stacklevel=2)
            continue
        if is_import_form(entry.name) or not entry.name or ":" not in entry.value:
            warnings.warn(f"the plug-in agent {entry.name!r} = {entry.value!r} of {where} is "
                          "left out: an entry point of the needbench.agents group is "
                          "name = \"module:Class\", the name without a colon",
                          PluginWarning, stacklevel=2)
            continue
        _PLUGINS[entry.name] = AgentSource("plug-in", entry.value, package, version,
                                           _distribution_folder(distribution))
        _ENTRIES[entry.name] = entry.value
    return _PLUGINS


def protocol_problem(target: Any) -> str | None:
    """What keeps ``target`` from being an agent class, or None if it is one.

    The protocol (:mod:`needbench.agents.base`): a class derived from ``Agent``
    with every abstract method (``learn``, ``_act``) implemented, and a
    hyperparameter dataclass unless it builds its own ``__init__``.
    """
    if not isinstance(target, type):
        return f"it is a {type(target).__name__}, not a class"
    if not issubclass(target, Agent):
        return "it does not derive from needbench.agents.base.Agent"
    if inspect.isabstract(target):
        missing = ", ".join(sorted(target.__abstractmethods__))
        return f"it does not implement {missing}"
    if target.__init__ is Agent.__init__ and not dataclasses.is_dataclass(
            target.Hyperparameters):
        return "its Hyperparameters is not a dataclass"
    return None


def _check_class(name: str, target: Any, where: str, require_name: bool) -> type[Agent]:
    problem = protocol_problem(target)
    if problem is not None:
        raise ConfigError(f"agent {name!r}", where, "a class implementing the agent protocol "
                          f"of needbench.agents.base (a concrete Agent subclass): {problem}")
    if require_name and target.name != name:
        raise ConfigError(f"agent {name!r}", where, f"a class whose name attribute is "
                          f"{name!r}, its registry name (it is {target.name!r})")
    return target


class AgentRegistry(Mapping[str, type[Agent]]):
    """Read-only mapping from registry name to agent class, resolved lazily.

    Holds the built-in agents, then the installed plug-ins (found on first
    use). ``name in AGENTS`` and ``list(AGENTS)`` never import an agent's
    module; ``AGENTS[name]`` imports it (once) and raises ImportError naming
    the missing optional dependency of a built-in agent, or ConfigError naming
    the package of a plug-in that cannot be imported or is no agent class.
    """

    def __init__(self, entries: dict[str, str | type[Agent]]):
        self._entries = entries

    def __getitem__(self, name: str) -> type[Agent]:
        discover_plugins()
        target = self._entries[name]
        if not isinstance(target, str):
            return target
        plugin = _PLUGINS.get(name)
        module_name, _, class_name = target.partition(":")
        if plugin is not None:
            where = f"{target} of package {plugin.package} {plugin.version}"
            try:
                module = importlib.import_module(module_name)
                loaded = resolve_attribute(f"agent {name!r}", where, module, class_name)
            except ConfigError:
                raise
            except Exception as error:  # the plug-in's module is missing or raised
                raise ConfigError(f"agent {name!r}", where, "an entry point whose module "
                                  f"imports ({type(error).__name__}: {error})") from None
            loaded = _check_class(name, loaded, where, require_name=True)
        else:
            try:
                module = importlib.import_module(module_name)
            except ImportError as error:
                raise ImportError(
                    f"agent {name!r} needs {error.name or 'a missing package'!r}; deep agents "
                    "need the 'deep' extra of needbench") from error
            loaded = getattr(module, class_name)
            if not (isinstance(loaded, type) and issubclass(loaded, Agent)):
                raise TypeError(f"{module_name}:{class_name} is not an Agent subclass")
            if loaded.name != name:
                raise TypeError(f"{module_name}:{class_name}.name is {loaded.name!r}, "
                                f"registered as {name!r}")
        self._entries[name] = loaded
        return loaded

    def __iter__(self) -> Iterator[str]:
        discover_plugins()
        return iter(list(self._entries))

    def __len__(self) -> int:
        discover_plugins()
        return len(self._entries)

    def __contains__(self, name: object) -> bool:
        discover_plugins()
        return name in self._entries


AGENTS = AgentRegistry(_ENTRIES)


def register_agent(name: str, target: str | type[Agent]) -> None:
    """Add an agent under ``name``: a class or a lazy ``"module:Class"`` string."""
    discover_plugins()
    if not isinstance(name, str) or not name:
        raise ConfigError("agent name", name, "a non-empty string")
    if name in _ENTRIES:
        raise ConfigError("agent name", name, "a name not yet registered: "
                          + ", ".join(sorted(_ENTRIES)))
    if is_import_form(name):
        raise ConfigError("agent name", name, "a name without a colon (a colon names a "
                          "module:Class to import)")
    if isinstance(target, str):
        if ":" not in target:
            raise ConfigError(f"agents.{name}", target, "'module:Class'")
    elif not (isinstance(target, type) and issubclass(target, Agent)):
        raise ConfigError(f"agents.{name}", target, "an Agent subclass or 'module:Class'")
    _ENTRIES[name] = target
    _REGISTERED.add(name)


def agent_source(name: str) -> AgentSource:
    """Where the agent ``name`` comes from (built-in, plug-in, registered or import)."""
    discover_plugins()
    if name in _PLUGINS:
        return _PLUGINS[name]
    if name in _BUILTIN_NAMES:
        target = _ENTRIES[name]
        text = target if isinstance(target, str) else f"{target.__module__}:{target.__name__}"
        return AgentSource("built-in", text)
    if name in _ENTRIES:
        target = _ENTRIES[name]
        text = target if isinstance(target, str) else f"{target.__module__}:{target.__name__}"
        return AgentSource("registered", text)
    if is_import_form(name):
        module_name = name.partition(":")[0]
        return AgentSource("import", name, folder=module_root(module_name))
    raise KeyError(name)


def check_agent_name(name: Any, *, allow_import: bool = False, path: str = "agent") -> str:
    """``name`` if it is registered (or a ``module:Class`` name, with ``allow_import``),
    else ConfigError suggesting the nearest name."""
    if isinstance(name, str) and name in AGENTS:
        return name
    if is_import_form(name):
        split_import_form(path, name, attribute=True)
        require_import_allowed(path, name, "agent name", allow_import)
        return name
    names = sorted(AGENTS)
    near = difflib.get_close_matches(name, names, n=1) if isinstance(name, str) else []
    hint = f" (did you mean {near[0]!r}?)" if near else ""
    raise ConfigError(path, name, "one of " + ", ".join(repr(n) for n in names) + hint
                      + ", or a local class as 'module:Class' with --allow-import")


def agent_class(name: str, *, allow_import: bool = False, path: str = "agent") -> type[Agent]:
    """The class of agent ``name``: a registry name, or ``module:Class`` with ``allow_import``.

    Raises ConfigError for an unknown name, for ``module:Class`` without
    ``allow_import`` (:class:`~needbench.agents.imports.ImportNotAllowed`: importing
    runs the module's code), for a module that cannot be imported, and for a
    class that does not implement the agent protocol.
    """
    name = check_agent_name(name, allow_import=allow_import, path=path)
    if name in AGENTS:
        return AGENTS[name]
    module_name, attribute = split_import_form(path, name, attribute=True)
    module = import_user_module(path, name, module_name)
    target = resolve_attribute(path, name, module, attribute)
    return _check_class(name, target, name, require_name=False)


def hyperparameter_schema(cls: type[Agent]) -> type | None:
    """The dataclass ``cls``'s hyperparameters are checked against, or None.

    None for a class that builds its own ``__init__`` and declares no
    hyperparameter dataclass of its own: its keywords are passed through and
    checked by building it.
    """
    schema = getattr(cls, "Hyperparameters", None)
    if not dataclasses.is_dataclass(schema):
        return None
    if schema is NoHyperparameters and cls.__init__ is not Agent.__init__:
        return None
    return schema


def make_agent(name: str, observation_space: spaces.Space, action_space: spaces.Space,
               *, allow_import: bool = False, **hyperparameters: Any) -> Agent:
    """A new agent of registry ``name`` (or ``module:Class`` with ``allow_import``) for
    one copy's spaces.

    Raises ConfigError for an unknown name (suggesting the nearest) or an
    unknown or invalid hyperparameter.
    """
    cls = agent_class(name, allow_import=allow_import)
    return cls(observation_space, action_space, **hyperparameters)
