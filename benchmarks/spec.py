"""Benchmark suites: TOML files parsed into frozen, validated dataclasses, then expanded into jobs.

A suite file (parsed with the standard library's ``tomllib``):

    [suite]
    name = "warm-day"                 # required
    description = "Two tasks, ..."    # optional
    seeds = [0, 1, 2]                 # required: distinct integers in [0, 2**32 - 1]
    eval_episodes = 10                # optional: evaluation episodes per job, >= 1 (default 10)
    gamma = 0.99                      # optional: discount in (0, 1) for metrics (default 0.99)
    max_total_steps = 1000000000      # optional: the largest learning budget allowed (a guard
                                      # against a typo that would run for days; default 10**9)

    [[task]]                          # one or more
    id = "needbench/Menu-v0"          # a needbench task id ("module:EnvId" with allow_import)
    [task.kwargs]                     # optional: keyword arguments for gymnasium.make
    task_weight = 0.0
    [task.agents.tabular-q]           # optional: this task's settings of a suite agent,
    total_steps = 50000               # over its [[agent]] entry (a budget, and
    [task.agents.tabular-q.hyperparameters]  # hyperparameters merged key by key)
    world_bins = 4

    [[agent]]                         # one or more
    name = "tabular-q"                # a registry name, built-in or plug-in
                                      # ("module:Class" with allow_import)
    total_steps = 20000               # learning budget in env steps, in [0, max_total_steps]
    [agent.hyperparameters]           # optional: keyword arguments for make_agent
    learning_rate = 0.1

    [[sweep]]                         # zero or more; their grids multiply
    target = "task"                   # 'task' (a kwarg), 'agent' (a hyperparameter) or 'gamma'
    parameter = "task_weight"         # the kwarg or hyperparameter ('total_steps' for the
                                      # agent's budget); omit for 'gamma'
    values = [0.0, 0.5, 1.0]
    match = "needbench/Menu-v0"       # optional: only this task id (or agent name)

:func:`expand` turns a suite into jobs, one per task x agent x seed x point of
the sweep grid. A job carries its fully resolved config (sweep values already
written into the task kwargs, agent hyperparameters or gamma) and a hash of it,
the job's identity in the results store.

Every problem raises :class:`SuiteError`, naming the file, the key path (e.g.
``agent[1].total_steps``), the bad value and what is allowed, with the nearest
valid name suggested for a misspelt key, task id or agent name.

:func:`parse_suite` checks the file's own structure; :func:`load_suite` (what
the command line calls) also checks the suite whole with the tasks' and
agents' own checkers (:func:`check_suite`): every task keyword and value,
every hyperparameter, every sweep parameter and value, and each (task, agent)
pair of the grid, so that a typo stops the run before anything is made.
Arrays of tables under ``extra_needs`` and ``couplings`` declare
:class:`~needbench.envs.Need` and :class:`~needbench.envs.Coupling` objects
(:func:`task_arguments`).
"""

from __future__ import annotations

import copy
import datetime
import difflib
import hashlib
import itertools
import json
import math
import re
import tomllib
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from dataclasses import fields as dataclass_fields
from pathlib import Path
from typing import Any

from needbench.agents.base import MAX_SEED
from needbench.agents.curves import DEFAULT_DISCOUNT
from needbench.agents.imports import is_import_form, require_import_allowed, split_import_form
from needbench.envs.errors import ConfigError

SWEEP_TARGETS = ("task", "agent", "gamma")
DEFAULT_EVAL_EPISODES = 10
DEFAULT_GAMMA = DEFAULT_DISCOUNT
#: The default bound on a learning budget, env steps; ``[suite] max_total_steps`` raises it.
DEFAULT_MAX_TOTAL_STEPS = 10**9
#: What SQLite's INTEGER holds: the bound on ``max_total_steps`` itself.
_LARGEST_INTEGER = 2**63 - 1


class SuiteError(ConfigError):
    """A suite file is invalid.

    Attributes (besides ConfigError's ``path``, ``value``, ``allowed``):
        source: the suite file's path, or ``<string>`` for text.
        suggestion: the nearest valid key or name, when one is close.
    """

    def __init__(self, source: str, path: str, value: Any, allowed: str,
                 suggestion: str | None = None):
        self.source = source
        self.suggestion = suggestion
        if suggestion is not None:
            allowed = f"{allowed} (did you mean {suggestion!r}?)"
        super().__init__(path, value, allowed, context=source)


class _Missing:
    """Stands for a required key that is absent (shown as <missing> in messages)."""

    def __repr__(self) -> str:
        return "<missing>"


MISSING = _Missing()


# ----------------------------------------------------------------------------
# The suite, as dataclasses
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class TaskSpec:
    """A task of the suite: a Gymnasium id and the keyword arguments to make it with.

    Attributes:
        agents: this task's own settings of some of the suite's agents, by
            agent name: ``{"total_steps": int, "hyperparameters": {...}}``,
            either key optional. A job of this task takes the agent's
            budget from here when given, and its hyperparameters are the
            agent's with these written over them key by key (sweeps apply
            after). For a setting one value cannot serve on every task.
    """

    id: str
    kwargs: dict[str, Any] = field(default_factory=dict)
    agents: dict[str, dict[str, Any]] = field(default_factory=dict)


@dataclass(frozen=True)
class AgentSpec:
    """An agent of the suite: its registry name, learning budget and hyperparameters.

    Attributes:
        total_steps: environment steps of learning before evaluation (0 = none).
    """

    name: str
    total_steps: int
    hyperparameters: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Sweep:
    """One axis of the sweep grid.

    Attributes:
        target: 'task' (sets a task kwarg), 'agent' (an agent hyperparameter)
            or 'gamma' (the suite's discount).
        parameter: the kwarg or hyperparameter name; 'gamma' for target 'gamma';
            for target 'agent', 'total_steps' sweeps the learning budget.
        values: the values the axis takes, one job per value.
        match: restricts the axis to one task id ('task'), one agent name
            ('agent'), or either ('gamma'); None applies it everywhere.
    """

    target: str
    parameter: str
    values: tuple[Any, ...]
    match: str | None = None

    @property
    def label(self) -> str:
        """Key of this axis in a job's ``sweep`` dict, e.g. ``task.task_weight`` or ``gamma``."""
        return "gamma" if self.target == "gamma" else f"{self.target}.{self.parameter}"

    def applies_to(self, task_id: str, agent_name: str) -> bool:
        if self.match is None:
            return True
        if self.target == "task":
            return self.match == task_id
        if self.target == "agent":
            return self.match == agent_name
        return self.match in (task_id, agent_name)


@dataclass(frozen=True)
class Suite:
    """A validated suite: what to run (tasks x agents x seeds x sweeps) and how to score it.

    Attributes:
        eval_episodes: evaluation episodes per job.
        gamma: discount factor in (0, 1) for the discounted metrics.
        max_total_steps: the largest learning budget the suite accepts (not
            part of any job's config or hash).
        source: the file it came from (not part of equality).
    """

    name: str
    description: str
    tasks: tuple[TaskSpec, ...]
    agents: tuple[AgentSpec, ...]
    seeds: tuple[int, ...]
    eval_episodes: int = DEFAULT_EVAL_EPISODES
    gamma: float = DEFAULT_GAMMA
    sweeps: tuple[Sweep, ...] = ()
    max_total_steps: int = DEFAULT_MAX_TOTAL_STEPS
    source: str = field(default="<string>", compare=False)


# ----------------------------------------------------------------------------
# Parsing
# ----------------------------------------------------------------------------

_TOP_KEYS = ("suite", "task", "agent", "sweep")
_SUITE_KEYS = ("name", "description", "seeds", "eval_episodes", "gamma", "max_total_steps")
_TASK_KEYS = ("id", "kwargs", "agents")
_TASK_AGENT_KEYS = ("total_steps", "hyperparameters")
_AGENT_KEYS = ("name", "total_steps", "hyperparameters")
_SWEEP_KEYS = ("target", "parameter", "values", "match")


def _is_integer(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _nearest(word: str, choices: Collection[str]) -> str | None:
    matches = difflib.get_close_matches(word, list(choices), n=1)
    return matches[0] if matches else None


def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


class _Parser:
    """Reads one suite document; every check raises SuiteError naming ``source``."""

    def __init__(self, source: str, allow_import: bool = False):
        self.source = source
        self.allow_import = allow_import

    def error(self, path: str, value: Any, allowed: str, suggestion: str | None = None):
        return SuiteError(self.source, path, value, allowed, suggestion)

    def check_keys(self, table: Mapping[str, Any], allowed: tuple[str, ...], path: str) -> None:
        for key in table:
            if key not in allowed:
                raise self.error(_join(path, key), table[key],
                                 f"one of the keys {', '.join(map(repr, allowed))}"
                                 + (f" of {path}" if path else " at the top level"),
                                 _nearest(key, allowed))

    def table(self, value: Any, path: str, *, header: str) -> dict[str, Any]:
        if not isinstance(value, dict):
            raise self.error(path, value, f"a table ({header})")
        return value

    def tables(self, document: Mapping[str, Any], key: str, *, required: bool) -> list[dict]:
        """An array of tables, ``[[key]]``."""
        value = document.get(key, MISSING)
        if value is MISSING:
            if required:
                raise self.error(key, MISSING, f"at least one [[{key}]] table")
            return []
        if isinstance(value, dict) or not isinstance(value, list) \
                or not all(isinstance(item, dict) for item in value):
            raise self.error(key, value, f"an array of tables: write each as [[{key}]]")
        if required and not value:
            raise self.error(key, value, f"at least one [[{key}]] table")
        return value

    def string(self, table: Mapping[str, Any], key: str, path: str, *,
               default: Any = MISSING, what: str = "a non-empty string") -> str:
        value = table.get(key, default)
        if value is MISSING or not isinstance(value, str) or (not value and default is MISSING):
            raise self.error(_join(path, key), value,
                             what + (" (required)" if value is MISSING else ""))
        return value

    def integer(self, table: Mapping[str, Any], key: str, path: str, *, minimum: int,
                default: Any = MISSING, maximum: int = _LARGEST_INTEGER) -> int:
        value = table.get(key, default)
        if not _is_integer(value) or not minimum <= value <= maximum:
            allowed = (f"an integer >= {minimum} and < 2**63" if maximum == _LARGEST_INTEGER
                       else f"an integer in [{minimum}, {maximum}]")
            raise self.error(_join(path, key), value,
                             allowed + (" (required)" if value is MISSING else ""))
        return value

    def budget(self, value: Any, path: str, maximum: int) -> int:
        """A learning budget in env steps: an integer in [0, maximum]."""
        if not _is_integer(value) or not 0 <= value <= maximum:
            raise self.error(path, value, f"an integer in [0, {maximum}], env steps of "
                             "learning (raise [suite] max_total_steps to allow more)"
                             + (" (required)" if value is MISSING else ""))
        return value

    def gamma(self, value: Any, path: str) -> float:
        if not isinstance(value, (int, float)) or isinstance(value, bool) \
                or not 0.0 < value < 1.0:
            raise self.error(path, value, "a discount factor in (0, 1), e.g. 0.99")
        return float(value)

    def plain_value(self, value: Any, path: str) -> Any:
        """A value that JSON can hold (for the job hash): no TOML dates or times."""
        if isinstance(value, dict):
            return {key: self.plain_value(item, _join(path, key)) for key, item in value.items()}
        if isinstance(value, list):
            return [self.plain_value(item, f"{path}[{i}]") for i, item in enumerate(value)]
        if isinstance(value, (datetime.date, datetime.time)):
            raise self.error(path, value, "a string, number, boolean, array or table "
                                          "(TOML dates and times are not supported)")
        return value

    def name(self, value: str, path: str, known: Collection[str] | None, what: str) -> str:
        if known is not None and is_import_form(value):
            # module:Class (an agent) or module:EnvId (a task): imports the user's code.
            try:
                split_import_form(path, value, attribute=what == "agent name")
                require_import_allowed(path, value, what, self.allow_import)
            except ConfigError as error:
                raise self.error(error.path, error.value, error.allowed) from None
            return value
        if known is not None and value not in known:
            raise self.error(path, value, f"a registered {what}: {', '.join(sorted(known))}",
                             _nearest(value, known))
        return value

    # -- sections --------------------------------------------------------------

    def suite_table(self, document: Mapping[str, Any]) -> dict[str, Any]:
        if "suite" not in document:
            raise self.error("suite", MISSING, "a [suite] table with at least name and seeds")
        suite = self.table(document["suite"], "suite", header="[suite]")
        self.check_keys(suite, _SUITE_KEYS, "suite")
        seeds = suite.get("seeds", MISSING)
        allowed = "a non-empty array of distinct integers >= 0, e.g. [0, 1, 2]"
        if not isinstance(seeds, list) or not seeds:
            raise self.error("suite.seeds", seeds,
                             allowed + (" (required)" if seeds is MISSING else ""))
        for i, seed in enumerate(seeds):
            if not _is_integer(seed) or not 0 <= seed <= MAX_SEED:
                raise self.error(f"suite.seeds[{i}]", seed, f"an integer in [0, {MAX_SEED}]")
            if seed in seeds[:i]:
                raise self.error(f"suite.seeds[{i}]", seed, "a seed not already listed")
        return {
            "name": self.string(suite, "name", "suite"),
            "description": self.string(suite, "description", "suite", default="",
                                       what="a string"),
            "seeds": tuple(seeds),
            "eval_episodes": self.integer(suite, "eval_episodes", "suite", minimum=1,
                                          default=DEFAULT_EVAL_EPISODES),
            "gamma": self.gamma(suite.get("gamma", DEFAULT_GAMMA), "suite.gamma"),
            "max_total_steps": self.integer(suite, "max_total_steps", "suite", minimum=1,
                                            default=DEFAULT_MAX_TOTAL_STEPS),
        }

    def task(self, table: dict[str, Any], path: str, known: Collection[str] | None,
             max_total_steps: int) -> TaskSpec:
        self.check_keys(table, _TASK_KEYS, path)
        task_id = self.name(self.string(table, "id", path), f"{path}.id", known, "task id")
        kwargs = self.table(table.get("kwargs", {}), f"{path}.kwargs",
                            header=f"[{path.split('[')[0]}.kwargs]")
        settings = self.table(table.get("agents", {}), f"{path}.agents",
                              header="[task.agents.<agent name>]")
        agents = {}
        for name, entry in settings.items():
            where = _join(f"{path}.agents", name)
            entry = self.table(entry, where, header=f"[task.agents.{name}]")
            self.check_keys(entry, _TASK_AGENT_KEYS, where)
            if not entry:
                raise self.error(where, entry, "a table with total_steps and/or "
                                               "[task.agents.<name>.hyperparameters]")
            resolved: dict[str, Any] = {}
            if "total_steps" in entry:
                resolved["total_steps"] = self.budget(entry["total_steps"],
                                                      f"{where}.total_steps", max_total_steps)
            if "hyperparameters" in entry:
                given = self.table(entry["hyperparameters"], f"{where}.hyperparameters",
                                   header=f"[task.agents.{name}.hyperparameters]")
                resolved["hyperparameters"] = self.plain_value(given, f"{where}.hyperparameters")
            agents[name] = resolved
        return TaskSpec(task_id, self.plain_value(kwargs, f"{path}.kwargs"), agents)

    def agent(self, table: dict[str, Any], path: str, known: Collection[str] | None,
              max_total_steps: int) -> AgentSpec:
        self.check_keys(table, _AGENT_KEYS, path)
        name = self.name(self.string(table, "name", path), f"{path}.name", known, "agent name")
        total_steps = self.budget(table.get("total_steps", MISSING), f"{path}.total_steps",
                                  max_total_steps)
        hyperparameters = self.table(table.get("hyperparameters", {}),
                                     f"{path}.hyperparameters",
                                     header=f"[{path.split('[')[0]}.hyperparameters]")
        return AgentSpec(name, total_steps,
                         self.plain_value(hyperparameters, f"{path}.hyperparameters"))

    def sweep(self, table: dict[str, Any], path: str, task_ids: list[str],
              agent_names: list[str], max_total_steps: int) -> Sweep:
        self.check_keys(table, _SWEEP_KEYS, path)
        target = table.get("target", MISSING)
        if target not in SWEEP_TARGETS:
            raise self.error(f"{path}.target", target,
                             f"one of {', '.join(map(repr, SWEEP_TARGETS))}"
                             + (" (required)" if target is MISSING else ""),
                             _nearest(target, SWEEP_TARGETS) if isinstance(target, str) else None)
        if target == "gamma":
            parameter = table.get("parameter", "gamma")
            if parameter != "gamma":
                raise self.error(f"{path}.parameter", parameter,
                                 "'gamma' or no parameter, for target 'gamma'")
        else:
            parameter = self.string(table, "parameter", path,
                                    what=f"the name of the {target} parameter to sweep")
        values = table.get("values", MISSING)
        if not isinstance(values, list) or not values:
            raise self.error(f"{path}.values", values, "a non-empty array of values"
                             + (" (required)" if values is MISSING else ""))
        values = self.plain_value(values, f"{path}.values")
        seen: list[str] = []
        for i, value in enumerate(values):
            if target == "gamma":
                self.gamma(value, f"{path}.values[{i}]")
            if target == "agent" and parameter == "total_steps":
                self.budget(value, f"{path}.values[{i}]", max_total_steps)
            if canonical_json(value) in seen:
                raise self.error(f"{path}.values[{i}]", value, "a value not already listed")
            seen.append(canonical_json(value))
        match = table.get("match")
        if match is not None:
            candidates = {"task": task_ids, "agent": agent_names,
                          "gamma": task_ids + agent_names}[target]
            what = {"task": "task id of this suite", "agent": "agent name of this suite",
                    "gamma": "task id or agent name of this suite"}[target]
            if match not in candidates:
                shown = match if isinstance(match, str) else None
                raise self.error(f"{path}.match", match,
                                 f"a {what}: {', '.join(map(repr, candidates))}",
                                 _nearest(shown, candidates) if shown else None)
        return Sweep(target, parameter, tuple(values), match)

    # -- the whole document ----------------------------------------------------

    def suite(self, document: dict[str, Any], known_tasks: Collection[str] | None,
              known_agents: Collection[str] | None) -> Suite:
        self.check_keys(document, _TOP_KEYS, "")
        header = self.suite_table(document)
        tasks = tuple(self.task(table, f"task[{i}]", known_tasks, header["max_total_steps"])
                      for i, table in enumerate(self.tables(document, "task", required=True)))
        agents = tuple(self.agent(table, f"agent[{i}]", known_agents, header["max_total_steps"])
                       for i, table in enumerate(self.tables(document, "agent", required=True)))
        for kind, items, attribute in (("task", tasks, "id"), ("agent", agents, "name")):
            names = [getattr(item, attribute) for item in items]
            for i, name in enumerate(names):
                if name in names[:i]:
                    raise self.error(f"{kind}[{i}].{attribute}", name,
                                     f"a {kind} {attribute} not already listed "
                                     "(use a [[sweep]] to vary its settings)")
        task_ids = [task.id for task in tasks]
        agent_names = [agent.name for agent in agents]
        for i, task in enumerate(tasks):
            for name in task.agents:
                if name not in agent_names:
                    raise self.error(f"task[{i}].agents.{_toml_key(name)}", name,
                                     "the name of an [[agent]] of this suite: "
                                     + ", ".join(map(repr, agent_names)),
                                     _nearest(name, agent_names))
        sweeps = tuple(self.sweep(table, f"sweep[{i}]", task_ids, agent_names,
                                  header["max_total_steps"])
                       for i, table in enumerate(self.tables(document, "sweep", required=False)))
        self.check_sweep_overlap(sweeps, tasks, agents)
        return Suite(tasks=tasks, agents=agents, sweeps=sweeps, source=self.source, **header)

    def check_sweep_overlap(self, sweeps: tuple[Sweep, ...], tasks: tuple[TaskSpec, ...],
                            agents: tuple[AgentSpec, ...]) -> None:
        """Two sweeps may not set the same parameter of the same job."""
        for task, agent in itertools.product(tasks, agents):
            first: dict[str, int] = {}
            for i, sweep in enumerate(sweeps):
                if not sweep.applies_to(task.id, agent.name):
                    continue
                if sweep.label in first:
                    raise self.error(f"sweep[{i}]", sweep.label,
                                     f"a parameter no other sweep sets for task {task.id!r} "
                                     f"and agent {agent.name!r} (sweep[{first[sweep.label]}] "
                                     "already does; give each a different match)")
                first[sweep.label] = i


def _read(source: str | Path) -> tuple[str, str]:
    """(text, source name) from a path or from TOML text.

    A ``Path``, or a one-line string ending in ``.toml``, is read as a file;
    any other string is the TOML text itself.
    """
    is_file = isinstance(source, Path) or ("\n" not in source
                                           and source.strip().endswith(".toml"))
    if not is_file:
        return str(source), "<string>"
    path = Path(source)
    try:
        return path.read_text(encoding="utf-8"), str(path)
    except FileNotFoundError as error:
        raise SuiteError(str(path), "file", str(path), "an existing suite file") from error
    except UnicodeDecodeError as error:
        raise SuiteError(str(path), "file", str(path), "a UTF-8 encoded TOML file") from error


def parse_suite(source: str | Path, known_tasks: Collection[str] | None = None,
                known_agents: Collection[str] | None = None, *,
                allow_import: bool = False) -> Suite:
    """Parse and validate a suite from a file path or from TOML text.

    Args:
        source: a ``Path`` or ``*.toml`` path string, or the TOML text.
        known_tasks: registered task ids to check ``task[i].id`` against
            (None skips the check).
        known_agents: registered agent names to check ``agent[i].name`` against
            (None skips the check).
        allow_import: accept, when names are checked, agents named
            ``module:Class`` and tasks named ``module:EnvId``, whose use imports
            the user's module and runs its code (:mod:`needbench.agents.imports`);
            without it they are a SuiteError saying so.

    Raises:
        SuiteError: for any problem, naming the file, key path, value and what is allowed.
    """
    text, name = _read(source)
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise SuiteError(name, "toml syntax", str(error), "valid TOML") from error
    return _Parser(name, allow_import).suite(document, known_tasks, known_agents)


# ----------------------------------------------------------------------------
# Jobs
# ----------------------------------------------------------------------------

def canonical_json(value: Any) -> str:
    """JSON with sorted keys and no spaces: equal configs give equal text."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def config_hash(config: Mapping[str, Any]) -> str:
    """sha256 (hex) of the config's canonical JSON."""
    return hashlib.sha256(canonical_json(config).encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class Job:
    """One unit of work: learn one agent on one task with one seed, then evaluate.

    ``config`` is fully resolved (sweep values written in):

        {"suite": str, "seed": int, "eval_episodes": int, "gamma": float,
         "task": {"id": str, "kwargs": {...}},
         "agent": {"name": str, "total_steps": int, "hyperparameters": {...}},
         "sweep": {"task.task_weight": 0.5, ...}}    # this job's grid point

    ``hash`` is the sha256 of its canonical JSON, so it changes with any field
    and not with key order. The suite name is part of the config: two suites
    never share runs.
    """

    config: dict[str, Any]
    hash: str = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "hash", config_hash(self.config))

    def __hash__(self) -> int:
        return hash(self.hash)

    @property
    def task_id(self) -> str:
        return self.config["task"]["id"]

    @property
    def agent_name(self) -> str:
        return self.config["agent"]["name"]

    @property
    def seed(self) -> int:
        return self.config["seed"]

    @property
    def task_kwargs(self) -> dict[str, Any]:
        """The task's keyword arguments as the suite wrote them (plain TOML values)."""
        return self.config["task"]["kwargs"]

    @property
    def task_arguments(self) -> dict[str, Any]:
        """The task's keyword arguments ready for ``gymnasium.make`` (:func:`task_arguments`)."""
        return task_arguments(self.task_kwargs)

    @property
    def agent_hyperparameters(self) -> dict[str, Any]:
        return self.config["agent"]["hyperparameters"]

    @property
    def total_steps(self) -> int:
        """The learning budget in env steps (summed over copies)."""
        return self.config["agent"]["total_steps"]

    @property
    def eval_episodes(self) -> int:
        return self.config["eval_episodes"]

    @property
    def gamma(self) -> float:
        """The scoring discount of this job's metrics and learning curves."""
        return self.config["gamma"]

    @property
    def sweep_point(self) -> dict[str, Any]:
        """This job's point of the sweep grid, ``{label: value}`` (empty without sweeps)."""
        return self.config["sweep"]

    def describe(self) -> str:
        """A short label, e.g. ``needbench/Menu-v0 tabular-q seed=0 task.task_weight=0.5``."""
        point = " ".join(f"{label}={canonical_json(value)}"
                         for label, value in sorted(self.sweep_point.items()))
        return " ".join(part for part in (self.task_id, self.agent_name, f"seed={self.seed}",
                                          point) if part)


#: Task keywords whose suite form is an array of tables, and what each table becomes.
DECLARED_KWARGS = {"extra_needs": "Need", "couplings": "Coupling"}


def task_arguments(kwargs: Mapping[str, Any]) -> dict[str, Any]:
    """A task's suite keywords as ``gymnasium.make`` takes them: each table of
    ``extra_needs`` becomes a :class:`~needbench.envs.Need` and each table of
    ``couplings`` a :class:`~needbench.envs.Coupling` (their fields as keys).

    Raises ConfigError (path ``extra_needs[i].<field>``) for an unknown field.
    """
    import needbench.envs as envs

    arguments = dict(kwargs)
    for key, class_name in DECLARED_KWARGS.items():
        tables = arguments.get(key)
        if not isinstance(tables, list) or not all(isinstance(t, Mapping) for t in tables):
            continue
        declared = getattr(envs, class_name)
        names = [f.name for f in dataclass_fields(declared)]
        items = []
        for i, table in enumerate(tables):
            for field_name, value in table.items():
                if field_name not in names:
                    raise ConfigError(f"{key}[{i}].{field_name}", value,
                                      f"a field of {class_name}: {', '.join(names)}"
                                      + _hint(field_name, names))
            try:
                items.append(declared(**table))
            except TypeError as error:  # a required field is missing
                raise ConfigError(f"{key}[{i}]", dict(table),
                                  f"a table with the fields {class_name} requires ({error})"
                                  ) from error
        arguments[key] = tuple(items)
    return arguments


def _hint(word: str, choices: Collection[str]) -> str:
    near = _nearest(word, choices)
    return f" (did you mean {near!r}?)" if near else ""


def _resolve(suite: Suite, task: TaskSpec, agent: AgentSpec, seed: int,
             point: tuple[tuple[Sweep, Any], ...]) -> dict[str, Any]:
    """The config of one job: the suite's settings with this grid point written in."""
    kwargs = copy.deepcopy(task.kwargs)
    own = task.agents.get(agent.name, {})
    hyperparameters = {**copy.deepcopy(agent.hyperparameters),
                       **copy.deepcopy(own.get("hyperparameters", {}))}
    gamma = suite.gamma
    total_steps = own.get("total_steps", agent.total_steps)
    for sweep, value in point:
        if sweep.target == "task":
            kwargs[sweep.parameter] = copy.deepcopy(value)
        elif sweep.target == "agent" and sweep.parameter == "total_steps":
            total_steps = value
        elif sweep.target == "agent":
            hyperparameters[sweep.parameter] = copy.deepcopy(value)
        else:
            gamma = float(value)
    return {
        "suite": suite.name,
        "seed": seed,
        "eval_episodes": suite.eval_episodes,
        "gamma": gamma,
        "task": {"id": task.id, "kwargs": kwargs},
        "agent": {"name": agent.name, "total_steps": total_steps,
                  "hyperparameters": hyperparameters},
        "sweep": {sweep.label: copy.deepcopy(value) for sweep, value in point},
    }


def expand(suite: Suite) -> list[Job]:
    """All jobs of a suite, in the order tasks x agents x seeds x sweep grid.

    For each (task, agent) pair, the sweeps that apply to it (see
    :attr:`Sweep.match`) span a cartesian grid; sweeps that do not apply add
    no jobs. Without sweeps the grid is a single point.
    """
    jobs = []
    for task in suite.tasks:
        for agent in suite.agents:
            sweeps = [sweep for sweep in suite.sweeps if sweep.applies_to(task.id, agent.name)]
            for seed in suite.seeds:
                for values in itertools.product(*(sweep.values for sweep in sweeps)):
                    point = tuple(zip(sweeps, values, strict=True))
                    jobs.append(Job(_resolve(suite, task, agent, seed, point)))
    return jobs


# ----------------------------------------------------------------------------
# Checking a suite whole, before anything runs
# ----------------------------------------------------------------------------

def registered_id(task_id: str) -> str:
    """The Gymnasium registry id of a task id: ``EnvId`` of ``module:EnvId``, else itself."""
    return task_id.partition(":")[2] if is_import_form(task_id) else task_id


def resolve_task_id(task_id: str, *, allow_import: bool = False, path: str = "task") -> str:
    """Check a task id a suite or the command line names, importing its module if need be.

    A registered needbench id passes as it is. A ``module:EnvId`` id
    (Gymnasium's form: importing ``module`` registers ``EnvId``) needs
    ``allow_import``; the module is imported here, and ``EnvId`` must then be
    registered, with a native vector env (``vector_entry_point``) of a needbench
    task (a ``NeedVectorEnv``: the harness reads needs, bands and drives from
    its core). Returns ``task_id``.

    Raises:
        ConfigError: naming ``path`` (an ImportNotAllowed without ``allow_import``).
    """
    import gymnasium as gym

    import needbench.envs

    if not is_import_form(task_id):
        if task_id not in needbench.envs.TASK_IDS:
            raise ConfigError(path, task_id, "a registered task id: "
                              + ", ".join(needbench.envs.TASK_IDS)
                              + ", or a task of your own as 'module:EnvId' with --allow-import"
                              + _hint(task_id, needbench.envs.TASK_IDS))
        return task_id
    module_name, env_id = split_import_form(path, task_id, attribute=False)
    require_import_allowed(path, task_id, "task id", allow_import)
    from needbench.agents.imports import import_user_module

    import_user_module(path, task_id, module_name)
    if env_id not in gym.registry:
        raise ConfigError(path, task_id, f"an id that module {module_name!r} registers with "
                          f"gymnasium.register ({env_id!r} is not registered after importing it)")
    from needbench.envs.task import NeedVectorEnv

    spec = gym.spec(env_id)
    vector = spec.vector_entry_point
    if isinstance(vector, str):
        try:
            vector = gym.envs.registration.load_env_creator(vector)
        except Exception as error:
            raise ConfigError(path, task_id, f"a vector_entry_point that loads "
                              f"({type(error).__name__}: {error})") from None
    if not (isinstance(vector, type) and issubclass(vector, NeedVectorEnv)):
        raise ConfigError(path, task_id, "a needbench task: registered with a "
                          "vector_entry_point that is a NeedVectorEnv subclass (found "
                          f"{spec.vector_entry_point!r}), since the harness reads the "
                          "needs, bands and drive from its core")
    return task_id


def _env_class(task_id: str) -> type | None:
    import importlib

    import gymnasium as gym

    entry_point = gym.spec(registered_id(task_id)).entry_point
    if not isinstance(entry_point, str):
        return entry_point if isinstance(entry_point, type) else None
    module_name, _, class_name = entry_point.partition(":")
    return getattr(importlib.import_module(module_name), class_name, None)


#: A drive names its parameters ``drive.<name>`` (or the drive, for unknown names).
_DRIVE_PATH = re.compile(r"^drive(?:\.(\w+)| \(.*\))$")


def _keyword_path(path: str, kwargs: Mapping[str, Any]) -> str:
    """The suite keyword behind a task's error path: a drive parameter is under
    ``drive_params`` in the suite."""
    match = _DRIVE_PATH.match(path)
    if match and "drive_params" in kwargs:
        return "drive_params" + (f".{match.group(1)}" if match.group(1) else "")
    return path


class _Checker:
    """Runs each task's and agent's own checks on a parsed suite; raises SuiteError."""

    def __init__(self, suite: Suite, allow_import: bool = False):
        self.suite = suite
        self.source = suite.source
        self.allow_import = allow_import
        self.classes: dict[str, type] = {}

    def resolve(self) -> None:
        """Every task id and agent class, importing the user's modules (with allow_import)."""
        from needbench.agents.registry import agent_class

        for i, task in enumerate(self.suite.tasks):
            try:
                resolve_task_id(task.id, allow_import=self.allow_import, path=f"task[{i}].id")
            except ConfigError as error:
                raise self.error(error.path, error.value, error.allowed) from None
        for a, agent in enumerate(self.suite.agents):
            try:
                self.classes[agent.name] = agent_class(agent.name, allow_import=self.allow_import,
                                                       path=f"agent[{a}].name")
            except ConfigError as error:
                path = error.path if error.path.startswith("agent[") else f"agent[{a}].name"
                raise self.error(path, error.value, error.allowed) from None

    def error(self, path: str, value: Any, allowed: str) -> SuiteError:
        return SuiteError(self.source, path, value, allowed)

    def keyword_names(self, task_id: str, kwargs: Mapping[str, Any], path: str) -> None:
        """Unknown keywords, with the task's own argument checker (``split_arguments``)."""
        from needbench.envs.task import split_arguments

        env_class = _env_class(task_id)
        world_class = getattr(env_class, "world_cls", None)
        if world_class is None:
            return
        try:
            # Declared tables (extra_needs, couplings) as the task receives them.
            split_arguments(world_class, getattr(env_class, "defaults", {}),
                            task_arguments(kwargs))
        except ConfigError as error:
            raise self.error(_join(path, error.path), error.value, error.allowed) from None
        except TypeError as error:  # a keyword of the wrong kind for the config dataclass
            raise self.error(path, dict(kwargs), f"keywords the task accepts ({error})") from None

    def make_task(self, task_id: str, kwargs: Mapping[str, Any], path: str,
                  blame: str | None = None, blamed: Any = None) -> None:
        """Build the task once with these keywords: its constructor checks every value.

        ``blame`` names the suite entry to report (a sweep value, ``blamed``);
        by default the keyword the task names, under ``path``.
        """
        import gymnasium as gym

        try:
            arguments = task_arguments(kwargs)
            gym.make(task_id, **arguments).close()
        except ConfigError as error:
            where = _keyword_path(error.path, kwargs)
            if blame is None:
                raise self.error(_join(path, where), error.value, error.allowed) from None
            raise self.error(blame, error.value, f"{error.allowed} ({task_id}: {where})") from None
        except Exception as error:  # a value the task's constructor could not use at all
            raise self.error(blame or path, dict(kwargs) if blame is None else blamed,
                             f"keywords {task_id} accepts ({type(error).__name__}: {error})"
                             ) from None

    def hyperparameters(self, name: str, given: Mapping[str, Any], path: str,
                        blame: str | None = None) -> None:
        """The agent's own hyperparameter dataclass, with its checks."""
        from needbench.agents.base import build_hyperparameters
        from needbench.agents.registry import hyperparameter_schema

        schema = hyperparameter_schema(self.classes[name])
        if schema is None:
            return  # no dataclass: checked by building the agent (agent_on_task)
        try:
            build_hyperparameters(schema, given, name)
        except ConfigError as error:
            field_path = error.path.removeprefix(f"{name}.")
            if blame is None:
                raise self.error(_join(path, field_path), error.value, error.allowed) from None
            raise self.error(blame, error.value, f"{error.allowed} ({name}.{field_path})") from None
        except TypeError as error:
            raise self.error(blame or path, dict(given),
                             f"hyperparameters {name} accepts ({error})") from None

    def agent_on_task(self, name: str, hyperparameters: Mapping[str, Any], task_id: str,
                      kwargs: Mapping[str, Any], path: str) -> None:
        """Build the agent for the task's spaces and let it check the task (``check_env``)."""
        from needbench.agents.base import NotApplicableError, env_spaces, make_task_vector_env

        agent_class = self.classes[name]
        env = make_task_vector_env(task_id, 1, agent_class.autoreset_mode, task_arguments(kwargs))
        try:
            agent = agent_class(*env_spaces(env), **hyperparameters)
            agent.check_env(env)
        except NotApplicableError:
            return  # listed as not applicable when the suite runs
        except ConfigError as error:
            raise self.error(path, error.value,
                             f"{error.allowed} (for {task_id}: {error.path})") from None
        except Exception as error:  # a class without a hyperparameter dataclass rejects them
            raise self.error(path, dict(hyperparameters), f"hyperparameters {name} accepts "
                             f"when built for {task_id} ({type(error).__name__}: {error})"
                             ) from None
        finally:
            env.close()

    def run(self) -> None:
        suite = self.suite
        self.resolve()
        for i, task in enumerate(suite.tasks):
            self.keyword_names(task.id, task.kwargs, f"task[{i}].kwargs")
            self.make_task(task.id, task.kwargs, f"task[{i}].kwargs")
        for a, agent in enumerate(suite.agents):
            self.hyperparameters(agent.name, agent.hyperparameters,
                                 f"agent[{a}].hyperparameters")
        by_name = {agent.name: agent for agent in suite.agents}
        for i, task in enumerate(suite.tasks):
            for name, own in task.agents.items():
                self.hyperparameters(name, {**by_name[name].hyperparameters,
                                            **own.get("hyperparameters", {})},
                                     f"task[{i}].agents.{_toml_key(name)}.hyperparameters")
        for j, sweep in enumerate(suite.sweeps):
            self.sweep(j, sweep)
        checked: set[str] = set()
        agents = {agent.name: a for a, agent in enumerate(suite.agents)}
        for job in expand(suite):
            key = canonical_json([job.task_id, job.task_kwargs, job.agent_name,
                                  job.agent_hyperparameters])
            if key in checked:
                continue
            checked.add(key)
            point = " ".join(f"{label}={canonical_json(value)}"
                             for label, value in sorted(job.sweep_point.items()))
            path = f"agent[{agents[job.agent_name]}].hyperparameters"
            task_index = next(i for i, task in enumerate(suite.tasks) if task.id == job.task_id)
            if job.agent_name in suite.tasks[task_index].agents:
                path += (f" with task[{task_index}].agents."
                         f"{_toml_key(job.agent_name)}.hyperparameters")
            if point:
                path += f" (at {point})"
            self.agent_on_task(job.agent_name, job.agent_hyperparameters, job.task_id,
                               job.task_kwargs, path)

    def sweep(self, j: int, sweep: Sweep) -> None:
        from needbench.agents.registry import hyperparameter_schema

        suite = self.suite
        if sweep.target == "task":
            for i, task in enumerate(suite.tasks):
                if not sweep.applies_to(task.id, ""):
                    continue
                try:
                    self.keyword_names(task.id, {**task.kwargs, sweep.parameter: sweep.values[0]},
                                       f"task[{i}].kwargs")
                except SuiteError as error:
                    if error.path != f"task[{i}].kwargs.{sweep.parameter}":
                        raise
                    raise self.error(f"sweep[{j}].parameter", sweep.parameter,
                                     f"{error.allowed} (a keyword of {task.id})") from None
                for k, value in enumerate(sweep.values):
                    self.make_task(task.id, {**task.kwargs, sweep.parameter: value},
                                   f"task[{i}].kwargs", blame=f"sweep[{j}].values[{k}]",
                                   blamed=value)
        elif sweep.target == "agent" and sweep.parameter != "total_steps":
            for a, agent in enumerate(suite.agents):
                if not sweep.applies_to("", agent.name):
                    continue
                schema = hyperparameter_schema(self.classes[agent.name])
                if schema is None:
                    continue  # no dataclass to check against: the pairs' builds check it
                known = [f.name for f in dataclass_fields(schema)]
                if sweep.parameter not in known:
                    allowed = ", ".join(["total_steps", *known])
                    raise SuiteError(self.source, f"sweep[{j}].parameter", sweep.parameter,
                                     f"'total_steps' or a hyperparameter of {agent.name}: "
                                     f"{allowed}", _nearest(sweep.parameter,
                                                            ["total_steps", *known]))
                for k, value in enumerate(sweep.values):
                    self.hyperparameters(agent.name,
                                         {**agent.hyperparameters, sweep.parameter: value},
                                         f"agent[{a}].hyperparameters",
                                         blame=f"sweep[{j}].values[{k}]")


def check_suite(suite: Suite, *, allow_import: bool = False) -> Suite:
    """Check a parsed suite whole, with each task's and each agent's own checkers.

    Every task's keywords (names with the task's argument checker, values by
    building the task: drive names, ``drive_params``, declared needs...),
    every agent's hyperparameters (its own dataclass), every sweep parameter
    and value, and every (task, agent) pair of the grid (the agent built for
    the task's spaces and its ``check_env``: an oversized table...). Pairs
    an agent does not handle at all are left to the runner, which lists them
    as not applicable. Returns the suite.

    With ``allow_import``, agents named ``module:Class`` and tasks named
    ``module:EnvId`` are imported here (their modules' code runs) and checked
    the same way; an agent class without a hyperparameter dataclass has its
    hyperparameters checked by building it for each task. Without it, such
    names are a SuiteError saying that they would import code.

    Raises:
        SuiteError: naming the file, the key path (``task[0].kwargs.max_step``),
            the bad value and what is allowed.
    """
    _Checker(suite, allow_import).run()
    return suite


def load_suite(source: str | Path, *, allow_import: bool = False) -> Suite:
    """Parse a suite against the registries and check it whole (:func:`check_suite`).

    ``allow_import=True`` accepts agents named ``module:Class`` and tasks named
    ``module:EnvId``: it imports those modules, running their code (the
    command line's ``--allow-import``). Built-in agents and tasks and installed
    plug-in agents need no permission.
    """
    import needbench.envs
    from needbench.agents.registry import AGENTS

    suite = parse_suite(source, known_tasks=needbench.envs.TASK_IDS, known_agents=list(AGENTS),
                        allow_import=allow_import)
    return check_suite(suite, allow_import=allow_import)


# ----------------------------------------------------------------------------
# Writing a suite back to TOML
# ----------------------------------------------------------------------------

def _toml_string(text: str) -> str:
    escaped = []
    for character in text:
        if character in ('"', "\\"):
            escaped.append("\\" + character)
        elif ord(character) < 0x20 or ord(character) == 0x7F:
            escaped.append(f"\\u{ord(character):04X}")
        else:
            escaped.append(character)
    return '"' + "".join(escaped) + '"'


def _toml_key(key: str) -> str:
    bare = key and all(c.isascii() and (c.isalnum() or c in "-_") for c in key)
    return key if bare else _toml_string(key)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(item) for item in value) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}"
                               for k, v in value.items()) + "}"
    raise ConfigError("suite value", value, "a string, number, boolean, list or table")


def to_toml(suite: Suite) -> str:
    """The suite as TOML text in the layout :func:`parse_suite` reads."""
    lines = ["[suite]", f"name = {_toml_value(suite.name)}",
             f"description = {_toml_value(suite.description)}",
             f"seeds = {_toml_value(list(suite.seeds))}",
             f"eval_episodes = {suite.eval_episodes}", f"gamma = {_toml_value(suite.gamma)}",
             f"max_total_steps = {suite.max_total_steps}"]
    for task in suite.tasks:
        lines += ["", "[[task]]", f"id = {_toml_value(task.id)}"]
        if task.kwargs:
            lines.append("[task.kwargs]")
            lines += [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in task.kwargs.items()]
        for name, own in task.agents.items():
            lines.append(f"[task.agents.{_toml_key(name)}]")
            if "total_steps" in own:
                lines.append(f"total_steps = {own['total_steps']}")
            if own.get("hyperparameters"):
                lines.append(f"[task.agents.{_toml_key(name)}.hyperparameters]")
                lines += [f"{_toml_key(k)} = {_toml_value(v)}"
                          for k, v in own["hyperparameters"].items()]
    for agent in suite.agents:
        lines += ["", "[[agent]]", f"name = {_toml_value(agent.name)}",
                  f"total_steps = {agent.total_steps}"]
        if agent.hyperparameters:
            lines.append("[agent.hyperparameters]")
            lines += [f"{_toml_key(k)} = {_toml_value(v)}"
                      for k, v in agent.hyperparameters.items()]
    for sweep in suite.sweeps:
        lines += ["", "[[sweep]]", f"target = {_toml_value(sweep.target)}",
                  f"parameter = {_toml_value(sweep.parameter)}",
                  f"values = {_toml_value(list(sweep.values))}"]
        if sweep.match is not None:
            lines.append(f"match = {_toml_value(sweep.match)}")
    return "\n".join(lines) + "\n"
