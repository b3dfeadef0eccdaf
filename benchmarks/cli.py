"""The ``needbench`` command line: list, describe, run, results, watch, report,
compare, reference, drive.

Exit codes: 0 success; 1 some jobs of a run failed (their tracebacks are in
the store); 2 bad input (unknown task, agent or suite, an invalid suite file,
a bad option), printed as one message without a traceback; 3 ``run phenomena``
ran every job but some phenomenon's effect was not met (or could not be
measured); 130 interrupted.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.resources
import math
import os
import sys
import time
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import numpy as np

from needbench.benchmarks.table import (
    format_table,
    result_cells,
    table_csv,
    table_json,
    table_width,
)
from needbench.envs.errors import ConfigError

#: File names inside a run's output folder.
STORE_NAME = "results.sqlite3"
#: One row per run (its identity and mean metrics); the aggregate table is
#: `needbench results DIR --csv`.
CSV_NAME = "runs.csv"
TENSORBOARD_NAME = "tensorboard"
#: Folder of the trained agents a run keeps (``run --save-agents``).
AGENTS_NAME = "agents"

#: ``needbench run phenomena``: every phenomena suite, into ``<out>/<name>``
#: (default ``results/phenomena/<name>``).
PHENOMENA = "phenomena"
#: Exit code of ``run phenomena`` when every job ran but some effect was not met
#: (or could not be measured).
EXIT_NOT_MET = 3

#: Seconds between progress lines when stdout is not a terminal (a log, nohup).
PROGRESS_LINE_SECONDS = 10.0


def package_version() -> str:
    try:
        return version("needbench")
    except PackageNotFoundError:  # running from a checkout that is not installed
        return "0+unknown"


def _print_error(error: BaseException) -> None:
    print(f"needbench: error: {error}", file=sys.stderr)


# ----------------------------------------------------------------------------
# Names: tasks and built-in suites
# ----------------------------------------------------------------------------

def task_ids() -> tuple[str, ...]:
    import needbench.envs

    return needbench.envs.TASK_IDS


def resolve_task(name: str, allow_import: bool = False) -> str:
    """A registered task id from an id (``needbench/Menu-v0``) or a short name (``Menu``),
    or a task of the user's own, ``module:EnvId``, with ``allow_import`` (imports module)."""
    from needbench.agents.imports import is_import_form
    from needbench.benchmarks.spec import resolve_task_id

    ids = task_ids()
    if name in ids:
        return name
    if is_import_form(name):
        return resolve_task_id(name, allow_import=allow_import, path="task")
    short = {task_id.split("/", 1)[-1].rsplit("-v", 1)[0].lower(): task_id for task_id in ids}
    if name.lower() in short:
        return short[name.lower()]
    import difflib

    near = difflib.get_close_matches(name, list(ids) + sorted(short), n=1)
    hint = f" (did you mean {near[0]!r}?)" if near else ""
    raise ConfigError("task", name, "a registered task id or short name: " + ", ".join(ids)
                      + ", or a task of your own as 'module:EnvId' with --allow-import" + hint)


def builtin_suites() -> dict[str, Path]:
    """Built-in suite names and their files; a suite in a subfolder is named
    ``folder/name`` (``phenomena/overconsumption``)."""
    folder = importlib.resources.files("needbench.benchmarks.suites")
    suites = {}
    for entry in folder.iterdir():
        if entry.name.endswith(".toml"):
            suites[Path(entry.name).stem] = Path(str(entry))
        elif entry.is_dir() and not entry.name.startswith(("_", ".")):
            for inner in entry.iterdir():
                if inner.name.endswith(".toml"):
                    suites[f"{entry.name}/{Path(inner.name).stem}"] = Path(str(inner))
    return suites


def resolve_suite(name: str) -> Path:
    """A suite file from a path or a built-in suite name."""
    from needbench.benchmarks.spec import SuiteError

    path = Path(name)
    if path.is_file():
        return path
    suites = builtin_suites()
    if name in suites:
        return suites[name]
    import difflib

    near = difflib.get_close_matches(name, sorted(suites), n=1)
    raise SuiteError(name, "suite", name, "an existing suite file or a built-in suite: "
                     + ", ".join(sorted(suites)), near[0] if near else None)


def load_suite(name: str, allow_import: bool = False):
    """Parse a suite and check it whole (``benchmarks.spec.load_suite``): task ids, agent
    names, every keyword, hyperparameter and sweep value, before anything runs.
    ``allow_import`` accepts ``module:`` agents and tasks (importing their modules)."""
    from needbench.benchmarks import spec

    return spec.load_suite(resolve_suite(name), allow_import=allow_import)


def allow_imports(args: argparse.Namespace) -> bool:
    """Whether ``--allow-import`` was given; if so, the current folder joins ``sys.path``
    (at its end, so a local file never hides an installed module), as ``python -m`` would."""
    allowed = bool(getattr(args, "allow_import", False))
    if allowed:
        from needbench.agents.imports import add_import_paths

        add_import_paths([os.getcwd()])
    return allowed


def _first_line(text: str | None) -> str:
    lines = [line.strip() for line in (text or "").strip().splitlines()]
    return lines[0] if lines else ""


def _env_class(task_id: str) -> type:
    import gymnasium as gym

    from needbench.benchmarks.spec import registered_id

    entry_point = gym.spec(registered_id(task_id)).entry_point
    if isinstance(entry_point, type):
        return entry_point
    module_name, _, class_name = str(entry_point).partition(":")
    return getattr(importlib.import_module(module_name), class_name)


def _run_folder(location: str) -> Path:
    """The folder of a run: the location itself, or the folder of a store file."""
    path = Path(location)
    return path if path.is_dir() else path.parent


def _make_folder(option: str, folder: Path) -> None:
    """Make an output folder, or ConfigError naming the option when it cannot be one."""
    if folder.exists() and not folder.is_dir():
        raise ConfigError(option, str(folder), "a folder, new or of an earlier run (a file of "
                          "that name exists)")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise ConfigError(option, str(folder), "a folder this user can create "
                          f"({error.strerror or error})") from error


def _open_store(location: str):
    """The store in a run's output folder, or a store file itself; never creates one."""
    from needbench.benchmarks.store import Store

    path = Path(location)
    if path.is_dir():
        path = path / STORE_NAME
    if not path.is_file():
        raise ConfigError("results", location, f"a run's output folder (holding {STORE_NAME}) "
                          "or a results store file")
    return Store(path)


# ----------------------------------------------------------------------------
# Commands
# ----------------------------------------------------------------------------

def command_list(args: argparse.Namespace) -> int:
    from needbench.agents.registry import AGENTS, agent_source

    print("Tasks")
    ids = task_ids()
    width = max(len(task_id) for task_id in ids)
    for task_id in ids:
        print(f"  {task_id:<{width}}  {_first_line(_env_class(task_id).__doc__)}")
    print("\nAgents")
    width = max(len(name) for name in AGENTS)
    for name in AGENTS:
        source = agent_source(name)
        try:
            about = _first_line(AGENTS[name].__doc__)
        except ImportError as error:
            about = f"(not available: {error})"
        except ConfigError as error:  # a plug-in that cannot be used
            about = f"(not usable: {error.allowed})"
        if source.kind == "plug-in":
            about = f"{about} [plug-in: {source.label}]"
        print(f"  {name:<{width}}  {about}")
    from needbench.benchmarks.spec import expand

    print("\nSuites")
    suites = builtin_suites()
    width = max((len(name) for name in suites), default=0)
    for name in sorted(suites):
        try:
            suite = load_suite(name)
            about = f"{suite.description} ({len(expand(suite))} jobs)"
        except ConfigError as error:
            about = f"(invalid here: {error})"
        print(f"  {name:<{width}}  {about}")
    return 0


def _space_text(space: Any) -> str:
    from gymnasium import spaces

    if isinstance(space, spaces.Box) and int(np.prod(space.shape)) > 8:
        return f"Box(shape={space.shape}, dtype={space.dtype})"
    return str(space)


def docstring_section(text: str | None, title: str) -> str:
    """The body of a ``## title`` section of a Gymnasium-style class docstring, dedented."""
    import textwrap

    lines = textwrap.dedent("\n".join((text or "").splitlines()[1:])).splitlines()
    body: list[str] = []
    inside = False
    for line in lines:
        if line.strip().startswith("## "):
            if inside:
                break
            inside = line.strip()[3:].strip().lower() == title.lower()
            continue
        if inside:
            body.append(line)
    return "\n".join(body).strip()


def command_describe(args: argparse.Namespace) -> int:
    import dataclasses

    import gymnasium as gym

    from needbench.envs.task import TaskConfig

    task_id = resolve_task(args.task, allow_imports(args))
    env_class = _env_class(task_id)
    env = gym.make(task_id)
    try:
        core = env.unwrapped.core
        physiology = core.physiology
        config = core.config
        print(task_id)
        print(f"  {_first_line(env_class.__doc__)}")
        print(f"\nobservation space: {_space_text(env.observation_space)}")
        internal = physiology.num_needs if config.interoception else 0
        features = core.world.feature_names
        if internal:
            print(f"  entries 0..{internal - 1}: deviations (h - h*) / band of "
                  + ", ".join(core.need_names) + ", in comfort-band units")
        if features:
            import textwrap

            print(f"  entries {internal}..{internal + len(features) - 1}: {len(features)} "
                  "world features, in order:")
            print(textwrap.fill(", ".join(features), width=96, initial_indent="    ",
                                subsequent_indent="    ", break_on_hyphens=False))
        print(f"action space: {env.action_space}")
        actions = docstring_section(env_class.__doc__, "Action Space").replace("``", "")
        if actions:
            print("  " + actions.replace("\n", "\n  "))
        print(f"time limit: {core.max_steps} steps; on lethal levels: {config.on_lethal}")
        print(f"drive: {config.drive} {dict(config.drive_params) or ''}".rstrip())
        print(f"reward: {config.reward} (drive_weight {config.drive_weight}, "
              f"task_weight {config.task_weight})")
        print(f"\nneeds ({config.preset} preset)")
        header = ("need", "unit", "set point", "band", "lethal low", "lethal high", "initial")
        rows = [header]
        for need in physiology.needs:
            rows.append((need.name, need.unit, f"{need.set_point:g}", f"{need.band:g}",
                         f"{need.lethal_low:g}", f"{need.lethal_high:g}",
                         f"[{need.initial_low:g}, {need.initial_high:g}]"))
        widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
        for row in rows:
            print("  " + "  ".join(text.ljust(width) for text, width in
                                   zip(row, widths, strict=True)).rstrip())
        defaults = {f.name: (f.default if f.default is not dataclasses.MISSING else
                             f.default_factory())
                    for f in dataclasses.fields(TaskConfig)}
        defaults.update(core.world.parameters)
        defaults.update(getattr(env_class, "defaults", {}))
        print("\ndefaults (keyword arguments of gymnasium.make / [task.kwargs])")
        width = max(len(key) for key in defaults)
        for key, value in defaults.items():
            print(f"  {key:<{width}}  {value!r}")
    finally:
        env.close()
    return 0


def command_run(args: argparse.Namespace) -> int:
    from needbench.benchmarks.runner import check_run_options

    if args.suite == PHENOMENA and not Path(args.suite).is_file():
        return command_run_phenomena(args)
    allow_import = allow_imports(args)
    suite = load_suite(args.suite, allow_import)
    # Every option is checked before the output folder is made.
    check_run_options(args.workers, args.backend, args.address, args.max_retries,
                      args.job_timeout)
    out = Path(args.out) if args.out is not None else Path("results") / suite.name
    tensorboard = Path(args.tensorboard) if args.tensorboard else None
    return _run_into(suite, out, tensorboard, args)


def _run_into(suite, out: Path, tensorboard: Path | None, args: argparse.Namespace,
              table: bool = True) -> int:
    """Run a loaded suite into ``out`` (made here); 1 if some of its jobs failed, else 0."""
    from needbench.benchmarks.lock import ResultsLock
    from needbench.benchmarks.runner import RunSettings, git_revision, run_suite
    from needbench.benchmarks.store import Store
    from needbench.benchmarks.tensorboard import NO_WRITER_MESSAGE, writer_backend

    _make_folder("--out", out)
    given_tensorboard = tensorboard is not None
    tensorboard = tensorboard if given_tensorboard else out / TENSORBOARD_NAME
    if given_tensorboard:
        _make_folder("--tensorboard", tensorboard)
    if writer_backend() is None:
        print(f"needbench: {NO_WRITER_MESSAGE}", file=sys.stderr)
        tensorboard = None
    agents = out / AGENTS_NAME if args.save_agents else None
    settings = RunSettings(tensorboard_root=None if tensorboard is None else str(tensorboard),
                           keep_traces=args.traces, git_revision=git_revision(),
                           agents_root=None if agents is None else str(agents))
    # The lock first: a read-only or full folder, or another run on it, stops
    # us before the store is opened or any job starts.
    with ResultsLock(out / STORE_NAME), Store(out / STORE_NAME) as store:
        summary = run_suite(suite, store, workers=args.workers, backend=args.backend,
                            address=args.address, settings=settings,
                            max_retries=args.max_retries, progress=not args.quiet,
                            progress_every=None if sys.stdout.isatty()
                            else PROGRESS_LINE_SECONDS, job_timeout=args.job_timeout,
                            retry_failed=args.retry_failed, allow_import=allow_imports(args))
        hashes = [job.hash for job in summary.jobs]
        failed = [run for run in store.runs(suite=suite.name, status="failed")
                  if run["hash"] in set(hashes)]
        store.export_csv(out / CSV_NAME)
        if not args.quiet:
            print(f"suite {suite.name}: {len(summary.jobs)} jobs, {len(summary.done)} done now, "
                  f"{len(summary.skipped)} already done, {len(summary.failed)} failed now, "
                  f"{len(summary.not_applicable)} not applicable "
                  f"({summary.wall_seconds:.1f} s)")
            if summary.skipped:
                print(f"{len(summary.skipped)} jobs already done in {out / STORE_NAME} were "
                      "not run again (another --out starts afresh)")
            if summary.left:
                print(f"{len(summary.left)} jobs never run were left out (--retry-failed "
                      "reruns only failed jobs; a rerun without it runs them)")
            _print_not_applicable(summary, args.verbose)
        if table:
            print(format_table(result_cells(store, hashes), table_width(args.wide)))
    for run in failed:
        last = (run["error"] or "").strip().splitlines()[-1:] or [""]
        print(f"failed: {run['task_id']} {run['agent']} seed={run['seed']}: {last[0]}",
              file=sys.stderr)
    if not args.quiet:
        tabled = "the table above as CSV" if table else "the results table"
        print(f"results store: {out / STORE_NAME}; one row per run: {out / CSV_NAME}; "
              f"{tabled}: needbench results {out}{' --csv' if table else ''}")
        if tensorboard is not None:
            print(f"tensorboard: tensorboard --logdir {tensorboard}")
        if agents is not None:
            print(f"trained agents: {agents}/ (one file per run, path in the agent_file column "
                  f"of {CSV_NAME}); replay one with needbench watch TASK --agent-file FILE")
    return 1 if failed else 0


def command_run_phenomena(args: argparse.Namespace) -> int:
    """Every phenomena suite, each into ``<out>/<name>``, then the table of their effects."""
    from needbench.benchmarks import phenomena
    from needbench.benchmarks.runner import check_run_options
    from needbench.benchmarks.store import Store

    modules = phenomena.phenomena()
    suites = {name: load_suite(module.SUITE) for name, module in modules.items()}
    check_run_options(args.workers, args.backend, args.address, args.max_retries,
                      args.job_timeout)
    base = Path(args.out) if args.out is not None else Path("results") / PHENOMENA
    _make_folder("--out", base)
    started = time.perf_counter()
    failed = False
    measured: list[phenomena.Measurement] = []
    for name, module in modules.items():
        out = base / name
        if not args.quiet:
            print(f"phenomenon {name}: suite {module.SUITE} into {out}")
        tensorboard = Path(args.tensorboard) / name if args.tensorboard else None
        code = _run_into(suites[name], out, tensorboard, args, table=False)
        failed |= code != 0
        with Store(out / STORE_NAME) as store:
            measured.append(phenomena.measure(module, store))
    print(phenomena.format_effects(measured))
    (base / phenomena.EFFECTS_FILE).write_text(phenomena.effects_json(measured) + "\n",
                                               encoding="utf-8")
    met = sum(1 for m in measured if m.met)
    print(f"{met} of {len(measured)} effects met ({time.perf_counter() - started:.0f} s); "
          f"effects: {base / phenomena.EFFECTS_FILE}; report: needbench report {base}")
    if failed:
        return 1
    return 0 if met == len(measured) else EXIT_NOT_MET


def _print_not_applicable(summary, verbose: bool) -> None:
    """One line for the pairs an agent does not handle; with ``verbose``, one line each."""
    pairs: dict[tuple[str, str], str] = {}
    for job, _ in summary.not_applicable:
        pairs.setdefault((job.agent_name, job.task_id), summary.needs.get(job.hash, ""))
    if not pairs:
        return
    count = f"{len(pairs)} agent-task pair{'s' if len(pairs) != 1 else ''} not applicable"
    jobs = len(summary.not_applicable)
    jobs_text = f"{jobs} job{'s' if jobs != 1 else ''} not run"
    if not verbose:
        print(f"{count} (the agent cannot act on that task), {jobs_text}; --verbose lists them")
        return
    print(f"{count}, {jobs_text}:")
    for (agent, task_id), needs in sorted(pairs.items()):
        print(f"  {agent} on {task_id.removeprefix('needbench/')}: the agent needs {needs}")


def command_results(args: argparse.Namespace) -> int:
    with _open_store(args.location) as store:
        cells = result_cells(store)
    if args.json:
        print(table_json(cells))
    elif args.csv:
        sys.stdout.write(table_csv(cells))
    else:
        print(format_table(cells, table_width(args.wide)))
    return 0


def parse_settings(pairs: list[str] | None) -> dict[str, Any]:
    """Hyperparameters from ``KEY=VALUE`` texts (``watch --set``).

    A value is read as a TOML value, as a suite's ``[agent.hyperparameters]``
    holds it (``0.1``, ``true``, ``[64, 64]``, ``"text"``); a bare word that is
    no TOML value is taken as a string. The agent's own hyperparameter
    dataclass checks names and values.
    """
    import tomllib

    values: dict[str, Any] = {}
    for pair in pairs or ():
        key, sep, text = pair.partition("=")
        key, text = key.strip(), text.strip()
        if not sep or not key or not text:
            raise ConfigError("--set", pair, "KEY=VALUE, e.g. epsilon_end=0.1 or net_arch=[64, 64]")
        try:
            values[key] = tomllib.loads(f"value = {text}")["value"]
        except tomllib.TOMLDecodeError:
            values[key] = text
    return values


class LearningProgress:
    """The logger ``watch`` hands to ``learn``: shows how far learning has got.

    Agents log at episode ends and optimiser updates; each call may show the
    steps done of the budget and the last episode's return. On a terminal the
    line rewrites itself; elsewhere a plain line is printed at most every
    ``every`` seconds. :meth:`close` prints the final count and the time taken.
    """

    def __init__(self, total_steps: int, discount: float, interactive: bool,
                 every: float = 2.0, stream: Any = None):
        self.total_steps = total_steps
        self.discount = discount  # read by needbench.agents.curves.scoring_discount
        self.interactive = interactive
        self.every = 0.2 if interactive else every
        self.stream = stream if stream is not None else sys.stdout
        self.step = 0
        self.last_return: float | None = None
        self.start = time.perf_counter()
        self._shown = -math.inf

    def line(self) -> str:
        share = self.step / self.total_steps if self.total_steps else 1.0
        text = f"learning: {self.step:,} / {self.total_steps:,} steps ({share:.0%})"
        if self.last_return is not None:
            text += f", last episode return {self.last_return:.3g}"
        return text

    def log_scalar(self, tag: str, value: float, step: int) -> None:
        self.step = max(self.step, int(step))
        if tag == "episode/return":
            self.last_return = float(value)
        now = time.perf_counter()
        if now - self._shown >= self.every:
            self._shown = now
            self.stream.write(("\r" + self.line() + "\x1b[K") if self.interactive
                              else self.line() + "\n")
            self.stream.flush()

    def close(self) -> None:
        self.step = self.total_steps
        ending = "\r" if self.interactive else ""
        self.stream.write(f"{ending}{self.line()}, {time.perf_counter() - self.start:.1f} s"
                          + ("\x1b[K" if self.interactive else "") + "\n")
        self.stream.flush()


def _action_text(action: Any) -> str:
    values = np.asarray(action).ravel()
    if values.size == 1:
        value = values[0]
        return str(int(value)) if np.issubdtype(values.dtype, np.integer) else f"{value:.3g}"
    return "[" + ", ".join(f"{v:.3g}" if np.issubdtype(values.dtype, np.floating) else str(v)
                           for v in values) + "]"


def step_caption(step: int, action: Any, reward: Any) -> str:
    """The line above a watched frame: the step, the action taken and the reward."""
    if action is None:
        return "step 0: start of the episode"
    return f"step {step}: action {_action_text(action)}, reward {float(reward):+.4g}"


def _watched_agent(args: argparse.Namespace, task_id: str, interactive: bool,
                   allow_import: bool = False):
    """The agent ``watch`` shows: loaded from --agent-file, or built (--set) and taught."""
    import gymnasium as gym

    from needbench.agents.base import Agent, NotApplicableError, learning_env
    from needbench.agents.registry import agent_class

    settings = parse_settings(args.set)
    probe = gym.make(task_id)
    try:
        if args.agent_file is not None:
            if settings:
                raise ConfigError("--set", " ".join(args.set), "no --set with --agent-file (the "
                                  "file holds the hyperparameters the agent learned with)")
            agent = Agent.load(args.agent_file)
            try:
                agent.check_env(probe)
            except ConfigError as error:
                raise ConfigError("--agent-file", args.agent_file, f"an agent saved for the "
                                  f"spaces of {task_id} ({error})") from None
            print(f"{agent.name} loaded from {args.agent_file}; it acts as saved "
                  "(no learning first)")
            return agent
        name = args.agent
        cls = agent_class(name, allow_import=allow_import, path="--agent")
        try:
            agent = cls(probe.observation_space, probe.action_space, **settings)
        except (ConfigError, NotApplicableError):
            raise
        except Exception as error:  # a class without a hyperparameter dataclass
            raise ConfigError("--set", " ".join(args.set or []), f"hyperparameters {name} "
                              f"accepts ({type(error).__name__}: {error})") from None
    except NotApplicableError as error:
        raise _not_applicable(args.agent, task_id, error) from None
    finally:
        probe.close()
    learning = learning_env(agent, task_id)
    try:
        if not agent.learns_from_experience:
            try:
                agent.learn(learning, 0, args.seed, None)
            except NotApplicableError as error:
                raise _not_applicable(name, task_id, error) from None
            print(f"{name} does not learn from experience: it reads the task and acts at once "
                  "(--learn-steps does not apply)")
        elif args.learn_steps:
            print(f"{name} learns for {args.learn_steps:,} steps first (a short budget; "
                  "--learn-steps N changes it)")
            progress = LearningProgress(args.learn_steps, WATCH_DISCOUNT, interactive)
            agent.learn(learning, args.learn_steps, args.seed, progress)
            progress.close()
        else:
            print(f"{name} acts without learning (--learn-steps 0)")
            agent.learn(learning, 0, args.seed, None)
    finally:
        learning.close()
    return agent


def _not_applicable(name: str, task_id: str, error: Any) -> ConfigError:
    """The error of an agent that does not handle the task, in plain words."""
    return ConfigError("--agent", name, f"an agent that handles {task_id} ({name} needs "
                       f"{error.allowed}; `needbench run` lists such pairs as not applicable)")


#: Discount of the watched episode's discounted drive and of the learning curves shown.
WATCH_DISCOUNT = 0.99


def command_watch(args: argparse.Namespace) -> int:
    import gymnasium as gym

    from needbench.benchmarks.evaluate import evaluation_seeds, rollout_single
    from needbench.benchmarks.metrics import episode_metrics
    from needbench.envs import rendering

    allow_import = allow_imports(args)
    task_id = resolve_task(args.task, allow_import)
    interactive = sys.stdout.isatty()
    agent = _watched_agent(args, task_id, interactive, allow_import)
    frames = None
    if args.frames is not None:  # made once the agent is ready, so a bad option leaves none
        frames = Path(args.frames)
        frames.mkdir(parents=True, exist_ok=True)
    delay = 1.0 / args.fps if interactive and args.fps > 0 else 0.0
    kwargs = {} if args.steps is None else {"max_steps": args.steps}
    env = gym.make(task_id, render_mode="ansi", **kwargs)
    count = 0

    def show(shown: gym.Env, action: Any, reward: Any) -> None:
        nonlocal count
        caption = step_caption(count, action, reward)
        if frames is not None:
            picture = rendering.frame(shown.unwrapped.core, 0, "rgb_array")
            rendering.write_png(rendering.with_caption(picture, caption),
                                frames / f"frame-{count:05d}.png")
        count += 1
        if interactive:
            sys.stdout.write("\x1b[H\x1b[2J")
        sys.stdout.write(f"{caption}\n{shown.render()}\n\n")
        sys.stdout.flush()
        if delay:
            time.sleep(delay)

    try:
        trace = rollout_single(env, agent, evaluation_seeds(args.seed, 1)[0], on_step=show)
        need_names = list(env.unwrapped.core.need_names)
    finally:
        env.close()
    metrics = episode_metrics(trace, WATCH_DISCOUNT, need_names)
    ending = "terminated (a need left its viable range)" if trace["terminated"] else "truncated"
    print(f"episode of {int(metrics['length'])} steps, {ending}: return {metrics['return']:.3g}, "
          f"discounted drive {metrics['discounted_drive']:.3g} (gamma {WATCH_DISCOUNT}), "
          f"time in band {metrics['time_in_band']:.1%}")
    if frames is not None:
        print(f"frames: {count} PNG files in {frames}/")
    return 0


def _require_plots() -> None:
    """ConfigError saying how to install matplotlib, for the verbs that draw."""
    try:
        importlib.import_module("matplotlib")
    except ImportError as error:
        raise ConfigError("plots", "matplotlib", "an installed matplotlib "
                          "(pip install 'needbench[plots]')") from error


def command_report(args: argparse.Namespace) -> int:
    _require_plots()
    from needbench.benchmarks.report import (
        build_phenomena_report,
        build_report,
        phenomena_folders,
    )

    out = Path(args.out) if args.out else _run_folder(args.location) / f"report.{args.format}"
    location = Path(args.location)
    if location.is_dir() and not (location / STORE_NAME).is_file() \
            and phenomena_folders(location, STORE_NAME):
        # A `run phenomena` folder: one store per phenomenon in its sub-folders.
        report = build_phenomena_report(location, out, format=args.format,
                                        store_name=STORE_NAME)
    else:
        with _open_store(args.location) as store:
            report = build_report(store, out, format=args.format, suite=args.suite,
                                      allow_import=allow_imports(args))
    folder = report.figures[0].path.parent if report.figures else None
    print(f"report: {report.path} ({len(report.sections) - 1} sections after the run facts, "
          f"{len(report.figures)} figures)")
    if folder is not None:
        print(f"figures: {folder}/ (PNG)")
    return 0


def _is_reference_file(name: str) -> bool:
    """Whether ``compare --reference`` names a reference file (a shipped name such as
    ``core``, or a ``.json`` file) rather than another run's folder or store."""
    from needbench.benchmarks.reference import shipped_references

    shipped = shipped_references()
    if name in shipped or name.endswith(".json"):
        return True
    if not Path(name).exists():
        raise ConfigError("--reference", name, "another run's folder or results store, a "
                          "shipped reference (" + (", ".join(shipped) or "none shipped yet")
                          + ") or a reference .json file")
    return False


def command_compare(args: argparse.Namespace) -> int:
    if args.reference is not None and _is_reference_file(args.reference):
        return _compare_with_reference(args)
    _require_plots()
    from needbench.benchmarks.compare import compare, comparison_figure, format_comparison
    from needbench.benchmarks.figures import save_png

    if args.agents is None:
        raise ConfigError("--agents", None, "two agents A B of the store (without --agents, "
                          "only --reference NAME|FILE.json compares every agent)")
    first, second = args.agents
    metric = args.metric or "return"
    with _open_store(args.location) as store:
        if args.reference is None:
            comparison = compare(store, first, second, metric)
        else:
            with _open_store(args.reference) as reference:
                comparison = compare(store, first, second, metric, reference)
        agents = sorted({run["agent"] for run in store.runs(status="done")} | {second})
    if args.json:
        print(comparison.to_json())
    else:
        print(format_comparison(comparison))
    out = Path(args.out) if args.out else \
        _run_folder(args.location) / f"compare-{first}-{second}-{metric}"
    out.mkdir(parents=True, exist_ok=True)
    (out / "comparison.json").write_text(comparison.to_json() + "\n", encoding="utf-8")
    save_png(comparison_figure(comparison, agents), out / "comparison.png")
    if not args.json:
        print(f"\nwritten: {out / 'comparison.json'}, {out / 'comparison.png'}")
    return 0


def _compare_with_reference(args: argparse.Namespace) -> int:
    from needbench.benchmarks.compare import compare_with_reference, format_reference_comparison
    from needbench.benchmarks.reference import load_reference

    reference = load_reference(args.reference)
    with _open_store(args.location) as store:
        comparison = compare_with_reference(store, reference, args.metric,
                                            tuple(args.agents) if args.agents else None)
    print(comparison.to_json() if args.json else format_reference_comparison(comparison))
    out = Path(args.out) if args.out else \
        _run_folder(args.location) / f"compare-reference-{reference.suite}"
    _make_folder("--out", out)
    (out / "comparison.json").write_text(comparison.to_json() + "\n", encoding="utf-8")
    if not args.json:
        print(f"\nwritten: {out / 'comparison.json'}")
    return 0


def command_reference_build(args: argparse.Namespace) -> int:
    from needbench.benchmarks.reference import command_line, write_reference

    argv = ["reference", "build", args.location, "--out", args.out]
    argv += ["--suite", args.suite] if args.suite else []
    with _open_store(args.location) as store:
        reference = write_reference(store, args.out, args.suite, command=command_line(argv))
        failed = store.runs(suite=reference.suite, status="failed")
    tasks = len(reference.task_ids())
    print(f"reference {reference.suite!r}: {len(reference.runs)} runs on {tasks} tasks, "
          f"{reference.wall_seconds:.0f} s of jobs, written to {args.out}")
    if failed:
        print(f"needbench: {len(failed)} failed runs of {reference.suite!r} are not in the file "
              "(rerun them with `needbench run SUITE --out DIR --retry-failed` first)",
              file=sys.stderr)
    return 0


def command_reference_table(args: argparse.Namespace) -> int:
    from needbench.benchmarks.reference import load_reference, markdown_table

    sys.stdout.write(markdown_table(load_reference(args.reference)))
    return 0


def command_drive(args: argparse.Namespace) -> int:
    _require_plots()
    from needbench.benchmarks.figures import drive_figure, save_png
    from needbench.envs import make_drive, preset

    body = preset(args.preset)
    names = args.needs or list(body.needs)[:2]
    for name in names:
        if name not in body.needs:
            raise ConfigError("needs", name, f"needs of the {args.preset} preset: "
                              + ", ".join(body.needs))
    needs = [body.needs[name] for name in names]
    band = [need.band for need in needs]
    # Deviations count in comfort-band units, as the tasks' drives do.
    drive = make_drive("homeostatic", n=args.n, m=args.m, scale=band, num_needs=2)
    figure = drive_figure(drive, names, [need.unit for need in needs],
                          [need.set_point for need in needs], band,
                          f"homeostatic drive n = {args.n:g}, m = {args.m:g} "
                          f"({args.preset} preset)", outcome=args.outcome)
    save_png(figure, args.out)
    print(f"drive figure: {args.out}")
    return 0


# ----------------------------------------------------------------------------
# The parser
# ----------------------------------------------------------------------------

def _whole_number(minimum: int):
    """An argparse type: a whole number >= ``minimum``."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"{value} is not >= {minimum}")
        return value

    return parse


_positive = _whole_number(1)
_non_negative = _whole_number(0)


def _positive_seconds(text: str) -> float:
    """An argparse type: a finite number of seconds > 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(f"{text} is not a finite number > 0")
    return value


def _add_location(parser: argparse.ArgumentParser) -> None:
    """The DIR argument of the verbs that read a results store."""
    parser.add_argument("location", metavar="DIR",
                        help=f"a run's output folder, or a {STORE_NAME} file")


ALLOW_IMPORT_HELP = ("accept agents named module:Class and tasks named module:EnvId (Gymnasium's "
                     "form), modules importable from the current folder or PYTHONPATH: this "
                     "imports those modules and runs their code, so give it only for code you "
                     "trust (built-in and installed plug-in agents need no flag)")


def build_parser() -> argparse.ArgumentParser:
    from needbench.benchmarks.compare import COMPARABLE

    parser = argparse.ArgumentParser(
        prog="needbench",
        description="Benchmark agents that keep several internal needs near their set points.",
        epilog="Exit codes: 0 ok, 1 some jobs failed, 2 bad input, 3 some phenomenon's "
        "effect not met (run phenomena), 130 interrupted.",
    )
    parser.add_argument("--version", action="version", version=f"needbench {package_version()}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    listing = commands.add_parser("list", help="list the tasks, agents and built-in suites",
                                  description="List the registered tasks and agents and the "
                                  "built-in suites.")
    listing.set_defaults(handler=command_list)

    describe = commands.add_parser(
        "describe", help="show a task's spaces, needs and defaults",
        description="Show a task's observation and action spaces, its needs (set points, "
        "comfort bands, lethal bounds, units) and its default keyword arguments.")
    describe.add_argument("task", metavar="TASK", help="task id or short name, e.g. Menu")
    describe.add_argument("--allow-import", action="store_true", help=ALLOW_IMPORT_HELP)
    describe.set_defaults(handler=command_describe)

    run = commands.add_parser(
        "run", help="run a suite (resumes: jobs already done are skipped)",
        description="Run every job of a suite, record each in the results store as it "
        f"finishes, then print the results table and write {CSV_NAME} (one row per run). "
        "Rerunning with "
        "the same --out skips the jobs already done.")
    run.add_argument("suite", metavar="SUITE|FILE",
                     help="a built-in suite name (see `needbench list`) or a suite TOML file; "
                     "its agents are registry names (built-in or installed plug-ins), its "
                     "tasks needbench ids, unless --allow-import; "
                     f"`{PHENOMENA}`: every phenomena suite, each into <out>/<name>, then the "
                     f"table of their effects (exit {EXIT_NOT_MET} if one is not met)")
    run.add_argument("--out", metavar="DIR", help="output folder (default: results/<suite name>)"
                     f"; holds {STORE_NAME}, {CSV_NAME} and {TENSORBOARD_NAME}/ (for "
                     f"`{PHENOMENA}`: the parent of one such folder per phenomenon, default "
                     f"results/{PHENOMENA})")
    run.add_argument("--workers", metavar="N", type=_positive, default=None,
                     help="worker processes, or CPUs of a new local Ray instance "
                     "(default: the number of CPUs)")
    run.add_argument("--backend", choices=("local", "ray"), default="local",
                     help="local process pool (default) or Ray remote tasks")
    run.add_argument("--address", metavar="ADDR", default=None,
                     help="Ray cluster address (with --backend ray; default: a new local "
                     "instance)")
    run.add_argument("--tensorboard", metavar="DIR", default=None,
                     help=f"folder of the TensorBoard event files (default: <out>/"
                     f"{TENSORBOARD_NAME}), one sub-folder per job")
    run.add_argument("--traces", metavar="N", type=_non_negative, default=1,
                     help="evaluation episodes per job whose full trace is stored (default: 1)")
    run.add_argument("--save-agents", action="store_true",
                     help=f"keep every trained agent: one file per run in <out>/{AGENTS_NAME}/ "
                     "(its path is recorded with the run); replay one with `needbench watch "
                     "TASK --agent-file FILE`")
    run.add_argument("--max-retries", metavar="N", type=_non_negative, default=2,
                     help="reruns of a job whose worker process died or was lost (default: 2)")
    run.add_argument("--job-timeout", metavar="SECONDS", type=_positive_seconds, default=None,
                     help="stop a job running longer than this and record it as failed "
                     "(local and Ray backends; default: no limit)")
    run.add_argument("--allow-import", action="store_true", help=ALLOW_IMPORT_HELP)
    run.add_argument("--retry-failed", action="store_true",
                     help="run only the jobs the store holds as failed (jobs never run are "
                     "left for a plain rerun)")
    run.add_argument("--quiet", action="store_true",
                     help="no progress and no summary lines, only the results table (off a "
                     f"terminal, progress is a plain line every {PROGRESS_LINE_SECONDS:g} s)")
    run.add_argument("--wide", action="store_true",
                     help="print the results table with its intervals even when it is wider "
                     "than the terminal")
    run.add_argument("--verbose", action="store_true",
                     help="list every agent-task pair that is not applicable, with what the "
                     "agent needs")
    run.set_defaults(handler=command_run)

    results = commands.add_parser(
        "results", help="print the results table of a store",
        description="Print the results table (IQM and 95% bootstrap CI of return, "
        "discounted drive, time in band and survival per agent and task) of a results store.")
    _add_location(results)
    output = results.add_mutually_exclusive_group()
    output.add_argument("--json", action="store_true", help="print the table as JSON")
    output.add_argument("--csv", action="store_true",
                        help="print the table as CSV: the aggregate, one row per task, agent "
                        f"and sweep point (the per-run rows are in {CSV_NAME})")
    results.add_argument("--wide", action="store_true",
                         help="keep the intervals even when the table is wider than the "
                         "terminal")
    results.set_defaults(handler=command_results)

    watch = commands.add_parser(
        "watch", help="show an episode of an agent in the terminal",
        description="Let an agent learn briefly (or load one a run saved with --save-agents), "
        "then show one episode frame by frame with the task's text rendering, the action "
        "taken and the reward of every step, and the episode's return, discounted drive "
        "and time in band.")
    watch.add_argument("task", metavar="TASK", help="task id or short name, e.g. Menu")
    who = watch.add_mutually_exclusive_group(required=True)
    who.add_argument("--agent", metavar="NAME", help="registered agent name (built-in or "
                     "plug-in), or module:Class with --allow-import")
    who.add_argument("--agent-file", metavar="FILE", default=None,
                     help="an agent file (Agent.save; `run --save-agents` keeps one per "
                     "run) to replay as it is, without learning")
    watch.add_argument("--set", metavar="KEY=VALUE", action="append", default=None,
                       help="a hyperparameter of --agent, as in a suite's "
                       "[agent.hyperparameters] (a TOML value; repeat for several)")
    watch.add_argument("--steps", metavar="N", type=_positive, default=None,
                       help="time limit of the episode shown (default: the task's)")
    watch.add_argument("--seed", metavar="S", type=_non_negative, default=0,
                       help="seed of learning and of the episode (default: 0)")
    watch.add_argument("--learn-steps", metavar="N", type=_non_negative, default=5000,
                       help="learning budget before the episode, env steps, for agents that "
                       "learn from experience (default: 5000)")
    watch.add_argument("--fps", metavar="F", type=float, default=8.0,
                       help="frames per second on a terminal; 0 for no pause (default: 8)")
    watch.add_argument("--frames", metavar="DIR", default=None,
                       help="also write every frame as a PNG image (rgb_array, captioned "
                       "with the step, action and reward) into DIR")
    watch.add_argument("--allow-import", action="store_true", help=ALLOW_IMPORT_HELP)
    watch.set_defaults(handler=command_watch)

    report = commands.add_parser(
        "report", help="write an HTML or Markdown report with figures of a run",
        description="Write a report of a results store: the run's facts, one table per task "
        "(IQM and 95% CI of every metric), and figures (internal-state traces, stability "
        "against return, learning curves, deviation per need, the drive landscape), every "
        "figure also as a PNG file. The HTML page embeds its figures and opens with no "
        "network.")
    _add_location(report)
    report.add_argument("--out", metavar="FILE", default=None,
                        help="the page to write (default: DIR/report.html or DIR/report.md); "
                        "figures go to <FILE stem>-figures/ beside it")
    report.add_argument("--format", choices=("html", "md"), default="html",
                        help="html (default), or md for a Markdown summary linking the PNGs")
    report.add_argument("--suite", metavar="NAME", default=None,
                        help="only the runs of this suite (default: every run of the store)")
    report.add_argument("--allow-import", action="store_true",
                        help="make tasks named module:EnvId for their figures (imports those "
                        "modules and runs their code)")
    report.set_defaults(handler=command_report)

    comparing = commands.add_parser(
        "compare", help="compare two agents, or your runs with a shipped reference",
        description="Compare two agents of a results store on one metric, per task and over "
        "all tasks both ran: the probability that a run of the first beats a run of the "
        "second, and the difference of their IQMs, each with a 95% bootstrap CI "
        "(Agarwal et al. 2021). Prints a table and writes comparison.json and "
        "comparison.png. With --reference NAME or FILE.json (a reference file, e.g. the "
        "shipped 'core'), every agent of the store is put beside the reference's agents "
        "on the tasks both hold: metrics, normalised scores (0 = random, 1 = the better of "
        "the planner and the setpoint controller on that metric), their IQM over tasks, "
        "and P(yours > shipped) with the IQM difference; the evaluation protocol (task "
        "keywords, evaluation episodes, discount, seeds) must be the reference's, else "
        "exit 2 names what differs.")
    _add_location(comparing)
    comparing.add_argument("--agents", nargs=2, metavar=("A", "B"), default=None,
                           help="the two agents, A compared against B (required without a "
                           "reference file; with one: your A against the reference's B only)")
    comparing.add_argument("--metric", default=None,
                           choices=tuple(COMPARABLE),
                           help="the metric compared (default: return; with a reference "
                           "file: discounted_drive or return, default both)")
    comparing.add_argument("--reference", metavar="RUN|NAME|FILE.json", default=None,
                           help="another run folder or results store: B's runs come from it "
                           "(only tasks evaluated under the same protocol are compared); or a "
                           "shipped reference name (core) or a reference file (.json)")
    comparing.add_argument("--out", metavar="DIR", default=None,
                           help="folder of comparison.json (and comparison.png) (default: "
                           "DIR/compare-A-B-METRIC, or DIR/compare-reference-SUITE)")
    comparing.add_argument("--json", action="store_true",
                           help="print the comparison as JSON instead of a table")
    comparing.set_defaults(handler=command_compare)

    referencing = commands.add_parser(
        "reference", help="build a reference file from a run, or print its Markdown table",
        description="Reference results: the per-run scores of a run of a suite in one JSON "
        "file (benchmarks/reference/<suite>.json ships with needbench), which `needbench "
        "compare DIR --reference NAME|FILE` reads.")
    referencing.set_defaults(handler=lambda args: (referencing.print_help(), 0)[1])
    verbs = referencing.add_subparsers(dest="verb", metavar="VERB")
    build = verbs.add_parser(
        "build", help="write the reference file of a run's done runs",
        description="Write one JSON file of every done run of a suite in a results store: "
        "task, agent, seed, sweep point, config hash, evaluation episodes and the mean of "
        "every metric, with the suite's protocol, the needbench versions and git revisions, "
        "the date, this command and the runs' wall time.")
    _add_location(build)
    build.add_argument("--out", metavar="FILE.json", required=True,
                       help="the file to write, e.g. benchmarks/reference/core.json")
    build.add_argument("--suite", metavar="NAME", default=None,
                       help="the suite whose runs to take (needed when the store holds several)")
    build.set_defaults(handler=command_reference_build)
    table = verbs.add_parser(
        "table", help="print a reference's Markdown table (per task and the ranking)",
        description="Print a reference as Markdown: per task each agent's discounted drive, "
        "time in band, return and survival (mean / IQM [95% CI]) and normalised scores, then "
        "the agents ranked by the IQM of their normalised discounted drive.")
    table.add_argument("reference", metavar="NAME|FILE.json",
                       help="a shipped reference name (core) or a reference file")
    table.set_defaults(handler=command_reference_table)

    drive = commands.add_parser(
        "drive", help="draw the drive landscape for chosen m and n (no run needed)",
        description="Draw the homeostatic drive D(h) = (sum_i |(h*_i - h_i)/band_i|^n)^(1/m) "
        "over two needs of a preset, and the reward of one fixed outcome at several "
        "internal states, as a PNG.")
    drive.add_argument("--m", type=float, default=2.0, help="the root m (default: 2)")
    drive.add_argument("--n", type=float, default=3.0, help="the exponent n (default: 3)")
    drive.add_argument("--preset", metavar="NAME", default="abstract",
                       help="the preset whose needs are drawn: abstract (default) or mammal")
    drive.add_argument("--needs", nargs=2, metavar=("NEED", "NEED"), default=None,
                       help="the two needs drawn (default: the preset's first two)")
    drive.add_argument("--outcome", type=float, default=1.0,
                       help="the fixed outcome: an intake of this many comfort bands of the "
                       "first need (default: 1)")
    drive.add_argument("--out", metavar="FILE.png", default="drive.png",
                       help="the PNG to write (default: drive.png)")
    drive.set_defaults(handler=command_drive)
    return parser


def _show_warning(shown: Any, message, category, filename, lineno, file=None,
                  line=None) -> None:
    """needbench's plug-in warnings as one line on stderr; others as before (``shown``)."""
    from needbench.agents.registry import PluginWarning

    if issubclass(category, PluginWarning):
        print(f"needbench: warning: {message}", file=sys.stderr if file is None else file)
    else:
        shown(message, category, filename, lineno, file, line)


def main(argv: list[str] | None = None) -> int:
    import functools
    import warnings

    with warnings.catch_warnings():
        warnings.showwarning = functools.partial(_show_warning, warnings.showwarning)
        return _main(argv)


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exit_request:  # --help, --version, or a usage error (code 2)
        return int(exit_request.code or 0)
    if args.command is None:
        parser.print_help()
        return 0
    try:
        return args.handler(args)
    except ConfigError as error:
        _print_error(error)
        return 2
    except KeyboardInterrupt:
        print("\nneedbench: interrupted; jobs already recorded are kept, rerun to resume",
              file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader of our output went away (e.g. `| head`); nothing left to say.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    sys.exit(main())
