"""The runner: a suite's jobs, run in a local process pool or on Ray, recorded in the store.

One job (:func:`run_job`) makes the task, makes the agent (``make_agent``),
lets it learn for its budget with a :class:`~needbench.benchmarks.tensorboard.RunLogger`,
evaluates it (:func:`needbench.benchmarks.evaluate.evaluate`), scores every
evaluation episode with :mod:`needbench.benchmarks.metrics` and returns a
:class:`~needbench.benchmarks.store.JobResult`. A job that raises comes back
as a failed result carrying its traceback; the sweep goes on.

Not every agent applies to every task. When building the agent for the
task's spaces, or its ``learn``, raises a ConfigError about the task itself
(path ``action_space``, ``observation_space``, ``env``, ``task`` or
``needs``: e.g. tabular Q-learning on continuous actions, a planner on a task
without a finite model), the job comes back :class:`NotApplicable`: the
driver lists it and does not record it. Any other error is the job's failure
and is recorded as such, with its traceback.

The learning env: every agent learns on the task's native vector env, made by
:func:`needbench.agents.base.learning_env` with the copies the agent asks for
and in its autoreset mode (``total_steps`` counts steps over all copies). The
copies are reset with the job's seed (copy j: seed + j, Gymnasium's
convention); evaluation episodes use seeds of their own
(:func:`needbench.benchmarks.evaluate.evaluation_seeds`). The logger hands the
suite's scoring discount (``gamma``) to the agent, so its learning curves and
the stored metrics share one definition (:mod:`needbench.agents.curves`).

:func:`run_suite` is the driver. It takes the store's lock
(:mod:`needbench.benchmarks.lock`: one run per store), skips jobs whose hash
the store already holds as done (so a rerun resumes an interrupted sweep; with
``retry_failed`` it runs only the jobs held as failed), runs the rest with
the chosen backend, and writes each result the moment it arrives, one
transaction per job: the driver is the store's only writer.

Backends:

* ``local`` (default): ``concurrent.futures.ProcessPoolExecutor`` with the
  ``spawn`` start method, one worker per CPU unless told otherwise, each
  limited to one BLAS/torch thread. If a worker process dies, the jobs it
  took down are run again in a fresh pool, at most ``max_retries`` times each,
  then recorded as failed with the worker's exit code or signal. A job over
  ``job_timeout`` seconds has its worker killed and is recorded as failed.
  Each worker checks twice a second that its driver is alive and exits when
  it is not, so a driver killed with SIGKILL leaves no worker running.
* ``ray``: the same job function as Ray remote tasks (``num_cpus=1`` each,
  ``max_retries`` for lost workers), on the cluster at ``address`` or on a
  local instance with ``num_cpus = workers``; a Ray session opened elsewhere
  in the process is used as it is. On a multi-node cluster the TensorBoard
  folder must be on a file system every node shares, and needbench must be
  installed on every node.
"""

from __future__ import annotations

import importlib
import math
import multiprocessing
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
import traceback
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from needbench.agents.base import (
    NotApplicableError,
    env_spaces,
    learning_env,
    make_task_vector_env,
)
from needbench.benchmarks.evaluate import MODES, evaluate, evaluation_metrics
from needbench.benchmarks.lock import ResultsLock
from needbench.benchmarks.metrics import summarise
from needbench.benchmarks.spec import Job, Suite, expand, resolve_task_id
from needbench.benchmarks.store import JobResult, Store, software_versions
from needbench.benchmarks.tensorboard import RunLogger, run_folder_name
from needbench.envs.errors import ConfigError, check_choice, check_positive

BACKENDS = ("local", "ray")

#: Environment variables that cap the threads of BLAS and OpenMP libraries.
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")

JobFunction = Callable[[dict[str, Any], str, "RunSettings"], "JobResult | NotApplicable"]
ResultSink = Callable[["JobResult | NotApplicable"], None]


@dataclass(frozen=True)
class RunSettings:
    """How every job of a run is carried out (the same for all jobs; not part of a job's hash).

    Attributes:
        tensorboard_root: folder under which each job writes its event files
            (one sub-folder per job), or None for no event files.
        keep_traces: evaluation episodes per job whose full trace is stored.
        evaluation_mode: 'vector', 'sync' or 'single' (see benchmarks.evaluate).
        git_revision: commit of the checkout, recorded with every result.
        agents_root: folder where each job saves its trained agent
            (``Agent.save``, one ``<label>.<hash digits>.npz`` file per job,
            the path recorded with the run), or None to keep none.
        allow_import: whether jobs may import a user's module for an agent
            named ``module:Class`` or a task named ``module:EnvId``
            (``--allow-import``); :func:`run_suite` sets it from its own keyword.
        import_paths: folders each worker appends to ``sys.path`` before a
            job, so it can import what the driver imported: the folders of
            those modules and of the plug-in distributions the suite uses
            (a Ray worker does not share the driver's ``sys.path``).
    """

    tensorboard_root: str | None = None
    keep_traces: int = 1
    evaluation_mode: str = "vector"
    git_revision: str | None = None
    agents_root: str | None = None
    allow_import: bool = False
    import_paths: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if isinstance(self.keep_traces, bool) or not isinstance(self.keep_traces, int) \
                or self.keep_traces < 0:
            raise ConfigError("keep_traces", self.keep_traces, "a whole number >= 0")
        check_choice("evaluation_mode", self.evaluation_mode, MODES)


# ----------------------------------------------------------------------------
# One job (runs in a worker process)
# ----------------------------------------------------------------------------

def limit_threads() -> None:
    """One BLAS/OpenMP/torch thread in this process, so W workers use W cores.

    Runs as the pool's worker initialiser, at the start of every job (Ray
    tasks have no initialiser) and again once the agent is built. torch reads
    ``OMP_NUM_THREADS`` when it is first imported, so a deep agent that
    imports it later still starts with one thread; a torch already loaded is
    set with ``torch.set_num_threads(1)``. torch is never imported here just
    for this: it takes seconds, and NumPy agents do not need it.
    """
    for variable in _THREAD_VARIABLES:
        os.environ[variable] = "1"
    torch = sys.modules.get("torch")
    if torch is not None:
        torch.set_num_threads(1)


@dataclass(frozen=True)
class NotApplicable:
    """What a job returns when its agent does not apply to its task (not stored).

    Attributes:
        hash: the job's hash.
        config: the job's config.
        reason: the agent's ConfigError message.
        needs: what the agent needs and the task lacks, in the agent's words
            (the error's ``allowed``), for a plain listing.
    """

    hash: str
    config: dict[str, Any]
    reason: str
    needs: str = ""


def run_job(config: dict[str, Any], job_hash: str,
            settings: RunSettings) -> JobResult | NotApplicable:
    """Learn, evaluate and score one job; never raises for a failure of the job itself.

    Args:
        config: the job's resolved config (``benchmarks.spec.Job.config``).
        job_hash: its hash (``Job.hash``).
        settings: the run's settings.

    Returns:
        A 'done' JobResult with one metrics dict per evaluation episode, the
        learning curves and the first ``settings.keep_traces`` traces; a
        'failed' one with the traceback (and the curves logged until then);
        or :class:`NotApplicable` (module docstring). With
        ``settings.agents_root`` the trained agent is saved before it is
        evaluated, and the result names its file.
    """
    import needbench.envs  # noqa: F401  (registers the tasks in this process)
    from needbench.agents.imports import add_import_paths
    from needbench.agents.registry import agent_class as resolve_agent
    from needbench.agents.registry import discover_plugins

    limit_threads()
    started = time.time()
    clock = time.perf_counter()
    logger: RunLogger | None = None
    env = None
    agent_file: Path | None = None
    environment = dict(software_versions())
    try:
        if add_import_paths(settings.import_paths):
            discover_plugins(refresh=True)  # plug-ins in the folders just added
        job = Job(config)
        resolve_task_id(job.task_id, allow_import=settings.allow_import, path="task.id")
        agent_class = resolve_agent(job.agent_name, allow_import=settings.allow_import,
                                    path="agent.name")
        environment.update(origin_record(job))
        arguments = job.task_arguments
        spaces_env = make_task_vector_env(job.task_id, 1, agent_class.autoreset_mode, arguments)
        try:
            agent = agent_class(*env_spaces(spaces_env), **job.agent_hyperparameters)
        except NotApplicableError as rejection:
            return NotApplicable(job_hash, config, str(rejection), rejection.allowed)
        finally:
            spaces_env.close()
        limit_threads()  # again: building a deep agent may have loaded torch
        env = learning_env(agent, job.task_id, arguments)
        folder = None
        if settings.tensorboard_root is not None:
            folder = Path(settings.tensorboard_root) / run_folder_name(job.describe(), job_hash)
            # A rerun (after a kill or a failure) replaces the folder: no partial
            # event files of an earlier attempt are left beside the new ones.
            shutil.rmtree(folder, ignore_errors=True)
        logger = RunLogger(folder, discount=job.gamma)
        need_names = list(env.unwrapped.core.need_names)
        try:
            agent.learn(env, job.total_steps, job.seed, logger)
        except NotApplicableError as rejection:
            if logger.tensorboard_dir is not None:
                logger.close()
                shutil.rmtree(logger.tensorboard_dir, ignore_errors=True)
            return NotApplicable(job_hash, config, str(rejection), rejection.allowed)
        env.close()
        env = None
        if settings.agents_root is not None:
            target = Path(settings.agents_root) / agent_file_name(job.describe(), job_hash)
            target.parent.mkdir(parents=True, exist_ok=True)
            agent.save(target)
            agent_file = target
        traces = evaluate(agent, job.task_id, arguments, job.eval_episodes, job.seed,
                          mode=settings.evaluation_mode)
        episodes = evaluation_metrics(traces, job.gamma, need_names)
        logger.log_evaluation(summarise(episodes), job.total_steps)
        status, error = "done", None
    except Exception:
        status, error, episodes, traces = "failed", traceback.format_exc(), [], []
    finally:
        if env is not None:
            env.close()
        if logger is not None:
            logger.close()
    return JobResult(hash=job_hash, config=config, status=status, started=started,
                     finished=time.time(), wall_seconds=time.perf_counter() - clock,
                     error=error, episodes=episodes,
                     curves=list(logger.curves) if logger is not None else [],
                     traces=traces[:settings.keep_traces], git_revision=settings.git_revision,
                     agent_file=None if agent_file is None else str(agent_file),
                     environment=environment)


def origin_record(job: Job) -> dict[str, str | None]:
    """Where a job's agent and task come from, for its run's ``environment`` record.

    A plug-in agent adds ``agent_package`` (the distribution's name) and the
    distribution's version under its own name, as the recorded libraries are;
    a ``module:Class`` agent or a ``module:EnvId`` task adds the file of the
    module (``agent_module``, ``task_module``). Built-ins add nothing.
    """
    from needbench.agents.imports import is_import_form
    from needbench.agents.registry import agent_source

    record: dict[str, str | None] = {}
    source = agent_source(job.agent_name)
    if source.kind == "plug-in":
        record["agent_package"] = source.package
        record[str(source.package)] = source.version
    for key, name in (("agent_module", job.agent_name), ("task_module", job.task_id)):
        if is_import_form(name):
            module = sys.modules.get(name.partition(":")[0])
            record[key] = getattr(module, "__file__", None)
    return record


def agent_file_name(label: str, job_hash: str) -> str:
    """The file name of a job's saved agent: the job's readable label, 8 hash digits."""
    return run_folder_name(label, job_hash) + ".npz"


def failed_result(job: Job, error: str, started: float, settings: RunSettings) -> JobResult:
    """A failed result made by the driver, for a job whose worker never reported back."""
    finished = time.time()
    return JobResult(hash=job.hash, config=job.config, status="failed", started=started,
                     finished=finished, wall_seconds=finished - started, error=error,
                     git_revision=settings.git_revision)


# ----------------------------------------------------------------------------
# Backends (run in the driver)
# ----------------------------------------------------------------------------

@contextmanager
def _single_threaded_children() -> Iterator[None]:
    """Thread caps in the environment while worker processes are spawned.

    A spawned worker loads NumPy's BLAS while unpickling its initialiser, before
    the initialiser could set these, so they must already be in the
    environment it inherits. The driver's own values are put back afterwards.
    """
    saved = {variable: os.environ.get(variable) for variable in _THREAD_VARIABLES}
    os.environ.update({variable: "1" for variable in _THREAD_VARIABLES})
    try:
        yield
    finally:
        for variable, value in saved.items():
            if value is None:
                os.environ.pop(variable, None)
            else:
                os.environ[variable] = value


#: In a pool worker: where the worker says which job it has started (set by the initialiser).
_started_jobs: Any = None

#: Seconds between a worker's checks that its driver is still alive.
PARENT_CHECK_SECONDS = 0.5


def _exit_with_parent(parent: int) -> None:
    """In a worker: end this process as soon as its driver is gone (the worker is reparented).

    A driver killed with SIGKILL cannot stop its workers; without this check
    they would run their jobs to the end, at full CPU, for no one.
    """
    while os.getppid() == parent:
        time.sleep(PARENT_CHECK_SECONDS)
    os._exit(1)


def _initialise_worker(started_jobs: Any, driver: int) -> None:
    """Pool worker initialiser: thread limits, the queue for job-start notices, and a
    thread that ends the worker when its driver dies."""
    global _started_jobs
    _started_jobs = started_jobs
    limit_threads()
    threading.Thread(target=_exit_with_parent, args=(driver,), daemon=True,
                     name="needbench-parent-check").start()


def _run_reporting_start(job_function: JobFunction, config: dict[str, Any], job_hash: str,
                         settings: RunSettings) -> JobResult | NotApplicable:
    """Tell the driver that this job has started, and in which process, then run it."""
    _started_jobs.put((job_hash, os.getpid()))
    return job_function(config, job_hash, settings)


def _drain(queue: Any, into: dict[str, tuple[int, float]]) -> None:
    """Job-start notices into ``{hash: (worker pid, start time on the driver's clock)}``."""
    while not queue.empty():
        job_hash, pid = queue.get()
        into[job_hash] = (pid, time.monotonic())


def _death_text(exit_code: int | None) -> str:
    """How a worker process ended, in words."""
    if exit_code is None:
        return "it vanished"
    if exit_code < 0:
        try:
            name = signal.Signals(-exit_code).name
        except ValueError:
            name = "an unknown signal"
        return f"it was killed by signal {-exit_code} ({name})"
    return f"it exited with code {exit_code}"


def _run_local(jobs: Sequence[Job], settings: RunSettings, workers: int, max_retries: int,
               job_function: JobFunction, on_result: ResultSink,
               on_idle: Callable[[], None] = lambda: None,
               job_timeout: float | None = None) -> None:
    """Run jobs in a spawn-context process pool; survive worker deaths and hung jobs.

    When a worker process dies (a crash in native code, the out-of-memory
    killer, ``os._exit``, a SIGKILL), the pool is broken and every unfinished
    job is lost. The jobs that had started (each worker reports a job's start
    and its PID on a queue) count one death each; all lost jobs go to a fresh
    pool, and a job with more than ``max_retries`` deaths is recorded as
    failed, with how its worker ended (exit code or signal). Jobs that were
    still waiting are never charged, so one crashing job cannot use up their
    retries.

    A job running longer than ``job_timeout`` seconds (from its start in a
    worker) has its worker killed and is recorded as failed at once (a hung
    job would hang again); the other jobs that the broken pool took down go
    to the fresh pool uncharged.
    """
    context = multiprocessing.get_context("spawn")
    deaths = {job.hash: 0 for job in jobs}
    remaining = list(jobs)
    while remaining:
        lost: list[Job] = []
        started: dict[str, tuple[int, float]] = {}
        finished: set[str] = set()
        timed_out: set[str] = set()
        submitted = time.time()
        # A SimpleQueue writes at once (no feeder thread), so a notice is not lost
        # when the worker dies right after sending it.
        started_jobs = context.SimpleQueue()
        with _single_threaded_children():
            pool = ProcessPoolExecutor(max_workers=min(workers, len(remaining)),
                                       mp_context=context, initializer=_initialise_worker,
                                       initargs=(started_jobs, os.getpid()))
            try:
                futures = {pool.submit(_run_reporting_start, job_function, job.config, job.hash,
                                       settings): job for job in remaining}
                # Workers are spawned on submit; keep them to read their exit codes.
                processes = dict(getattr(pool, "_processes", None) or {})
                waiting = set(futures)
                while waiting:
                    # Wake up now and then to empty the notice pipe, which would
                    # otherwise fill and block the workers.
                    ready, waiting = wait(waiting, timeout=0.5, return_when=FIRST_COMPLETED)
                    _drain(started_jobs, started)
                    processes.update(getattr(pool, "_processes", None) or {})
                    on_idle()
                    for future in ready:
                        job = futures[future]
                        if job.hash in timed_out:
                            continue
                        try:
                            result = future.result()
                        except BrokenProcessPool:
                            lost.append(job)
                            continue
                        except Exception:
                            result = failed_result(job, traceback.format_exc(), submitted,
                                                   settings)
                        finished.add(job.hash)
                        on_result(result)
                    if job_timeout is not None:
                        for job in _overdue(futures, waiting, started, finished | timed_out,
                                            job_timeout):
                            timed_out.add(job.hash)
                            _kill(started[job.hash][0])
                            on_result(failed_result(job, timeout_text(job_timeout),
                                                    submitted, settings))
            except BaseException:
                pool.shutdown(wait=False, cancel_futures=True)
                raise
            pool.shutdown(wait=True)
        _drain(started_jobs, started)
        started_jobs.close()
        remaining = []
        lost = [job for job in lost if job.hash not in timed_out]
        exit_codes = {job.hash: _exit_code(processes, started, job.hash) for job in lost}
        running = [job for job in lost if job.hash in started and job.hash not in finished]
        # The pool stops its other workers with SIGTERM once one dies: a job whose
        # worker ended otherwise is the culprit. Failing that, every job that was
        # running is charged. A round broken by a timeout charges no one else;
        # any other round that loses jobs charges at least one, so the loop ends.
        culprits = [job for job in running if exit_codes[job.hash] not in (None, -signal.SIGTERM)]
        for job in [] if timed_out else (culprits or running or lost):
            deaths[job.hash] += 1
        for job in lost:
            if deaths[job.hash] > max_retries:
                how = _death_text(exit_codes[job.hash])
                on_result(failed_result(
                    job, f"the worker process running this job died {deaths[job.hash]} times "
                    f"(max_retries = {max_retries}), the last time because {how}; it may "
                    "have run out of memory or crashed in native code", submitted, settings))
            else:
                remaining.append(job)


def timeout_text(job_timeout: float) -> str:
    """The error recorded for a job stopped by ``job_timeout`` (both backends)."""
    return (f"timed out: the job ran longer than job_timeout = {job_timeout:g} s, and its "
            "worker process was stopped")


def _exit_code(processes: Mapping[int, Any], started: Mapping[str, tuple[int, float]],
               job_hash: str) -> int | None:
    """The exit code of the worker that last ran a job (None: unknown, or still running)."""
    worker = processes.get(started[job_hash][0]) if job_hash in started else None
    return worker.exitcode if worker is not None else None


def _overdue(futures: Mapping[Any, Job], waiting: set[Any],
             started: Mapping[str, tuple[int, float]], settled: set[str],
             job_timeout: float) -> list[Job]:
    """The waiting jobs that started more than ``job_timeout`` seconds ago."""
    now = time.monotonic()
    return [futures[future] for future in waiting
            if futures[future].hash in started and futures[future].hash not in settled
            and now - started[futures[future].hash][1] > job_timeout]


def _kill(pid: int) -> None:
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass


def import_ray() -> Any:
    """The ``ray`` module, or ConfigError saying how to install it."""
    try:
        return importlib.import_module("ray")
    except ImportError as error:
        raise ConfigError("backend", "ray", "'local', or install Ray first (pip install "
                          "'needbench[cluster]')") from error


class _StartBoard:
    """A Ray actor where each job notes that it has started (for ``job_timeout``).

    ``started`` counts the attempts of each job, so the driver restarts its
    clock when Ray runs a job again after losing its worker.
    """

    def __init__(self) -> None:
        self.attempts: dict[str, int] = {}

    def start(self, job_hash: str) -> None:
        self.attempts[job_hash] = self.attempts.get(job_hash, 0) + 1

    def started(self) -> dict[str, int]:
        return dict(self.attempts)


def _run_noting_start(board: Any, job_function: JobFunction, config: dict[str, Any],
                      job_hash: str, settings: RunSettings) -> JobResult | NotApplicable:
    """A Ray task: note on the board that this job has started, then run it."""
    import ray

    ray.get(board.start.remote(job_hash))
    return job_function(config, job_hash, settings)


def _run_ray(jobs: Sequence[Job], settings: RunSettings, workers: int, address: str | None,
             max_retries: int, job_function: JobFunction,
             on_result: ResultSink, on_idle: Callable[[], None] = lambda: None,
             job_timeout: float | None = None) -> None:
    """Run jobs as Ray remote tasks.

    With ``job_timeout``, each task first notes its start on a small actor
    (:class:`_StartBoard`); a job running longer than ``job_timeout`` seconds
    from the moment the driver sees that note is cancelled with
    ``ray.cancel(force=True)``, which kills its worker process, and is
    recorded as failed at once; the other jobs go on.
    """
    ray = import_ray()
    owned = not ray.is_initialized()
    if owned:
        if address:
            try:
                ray.init(address=address)
            except Exception as error:  # Ray raises ConnectionError, RuntimeError...
                raise ConfigError("address", address, "the address of a running Ray cluster, "
                                  f"as `ray start --head` prints it ({error})") from error
        else:
            ray.init(num_cpus=workers, include_dashboard=False)
    pending: list[Any] = []
    board = None
    try:
        submitted = time.time()
        if job_timeout is None:
            remote = ray.remote(num_cpus=1, max_retries=max_retries)(job_function)
            by_reference = {remote.remote(job.config, job.hash, settings): job for job in jobs}
        else:
            board = ray.remote(num_cpus=0)(_StartBoard).remote()
            remote = ray.remote(num_cpus=1, max_retries=max_retries)(_run_noting_start)
            by_reference = {remote.remote(board, job_function, job.config, job.hash, settings):
                            job for job in jobs}
        pending = list(by_reference)
        # hash -> (attempt, when the driver first saw that attempt start)
        seen: dict[str, tuple[int, float]] = {}
        while pending:
            ready, pending = ray.wait(pending, num_returns=1, timeout=1.0 if board is None
                                      else min(1.0, job_timeout / 4))
            on_idle()
            for reference in ready:
                job = by_reference[reference]
                try:
                    result = ray.get(reference)
                except Exception:
                    result = failed_result(job, traceback.format_exc(), submitted, settings)
                on_result(result)
            if board is not None and pending:
                now = time.monotonic()
                for job_hash, attempt in ray.get(board.started.remote()).items():
                    if seen.get(job_hash, (0, 0.0))[0] != attempt:
                        seen[job_hash] = (attempt, now)
                overdue = [reference for reference in pending
                           if by_reference[reference].hash in seen
                           and now - seen[by_reference[reference].hash][1] > job_timeout]
                for reference in overdue:
                    ray.cancel(reference, force=True)
                    pending.remove(reference)
                    on_result(failed_result(by_reference[reference], timeout_text(job_timeout),
                                            submitted, settings))
    except BaseException:
        for reference in pending:
            ray.cancel(reference, force=True)
        raise
    finally:
        if board is not None:
            ray.kill(board)
        if owned:
            ray.shutdown()


# ----------------------------------------------------------------------------
# Progress on the terminal
# ----------------------------------------------------------------------------

def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    hours, rest = divmod(seconds, 3600)
    minutes, seconds = divmod(rest, 60)
    return f"{hours}h{minutes:02d}m" if hours else f"{minutes}m{seconds:02d}s"


class Progress:
    """Progress of a run: jobs done, failed, not applicable; elapsed time, ETA.

    Silent unless ``enabled`` (the command line enables it unless ``--quiet``).
    On a terminal (``every=None``) it is one self-rewriting status line. Off a
    terminal (batch systems, ``nohup``, a log file) give ``every`` in seconds:
    then a plain line is printed every ``every`` seconds (the backends call
    :meth:`tick` while they wait, so long jobs still show signs of life), and
    once at the end. The ETA assumes the remaining jobs
    take as long on average as the finished ones.
    """

    def __init__(self, total: int, skipped: int, enabled: bool, stream: TextIO | None = None,
                 every: float | None = None):
        self.total = total
        self.skipped = skipped
        self.enabled = enabled
        self.stream = stream if stream is not None else sys.stdout
        self.every = every
        self.done = 0
        self.failed = 0
        self.not_applicable = 0
        self.start = time.perf_counter()
        self._shown = False
        self._last_line = -math.inf
        self._last_count = 0

    def begin(self) -> None:
        """Show the line before the first job finishes."""
        if self.enabled and self.total and self.every is None:
            self._write(self.line(), final=False)

    def update(self, result: JobResult | NotApplicable) -> None:
        if isinstance(result, NotApplicable):
            self.not_applicable += 1
        elif result.status == "done":
            self.done += 1
        else:
            self.failed += 1
        if not self.enabled:
            return
        if isinstance(result, JobResult) and result.status == "failed":
            last = (result.error or "").strip().splitlines()[-1:] or [""]
            self._write(f"failed: {Job(result.config).describe()}: {last[0]}", final=True)
        if self.every is None:
            self._write(self.line(), final=False)
        else:
            self.tick()

    def tick(self) -> None:
        """Off a terminal: a plain progress line when ``every`` seconds have passed."""
        if self.enabled and self.every is not None \
                and time.perf_counter() - self._last_line >= self.every:
            self._write_periodic()

    def _finished(self) -> int:
        return self.done + self.failed + self.not_applicable

    def _write_periodic(self) -> None:
        self._last_line = time.perf_counter()
        self._last_count = self._finished()
        self.stream.write(f"progress {self.line()}\n")
        self.stream.flush()

    def line(self) -> str:
        finished = self._finished()
        elapsed = time.perf_counter() - self.start
        left = self.total - finished
        eta = _duration(elapsed / finished * left) if finished else "?"
        skipped = f", {self.skipped} already done" if self.skipped else ""
        skipped += f", {self.not_applicable} not applicable" if self.not_applicable else ""
        return (f"[{finished}/{self.total}] {self.done} done, {self.failed} failed{skipped}"
                f" | elapsed {_duration(elapsed)} | ETA {eta}")

    def _write(self, text: str, final: bool) -> None:
        width = shutil.get_terminal_size((100, 20)).columns - 1
        clear = "\r" + " " * width + "\r" if self._shown else ""
        self.stream.write(clear + (text if final else text[:width]) + ("\n" if final else ""))
        self.stream.flush()
        self._shown = not final

    def close(self) -> None:
        if self.enabled and self.every is not None:
            # The last count, unless the last periodic line already showed it.
            if self._finished() and self._finished() != self._last_count:
                self._write_periodic()
            return
        if self.enabled and self._shown:
            self.stream.write("\n")
            self.stream.flush()
            self._shown = False


# ----------------------------------------------------------------------------
# The driver
# ----------------------------------------------------------------------------

@dataclass
class RunSummary:
    """What a call of :func:`run_suite` did.

    Attributes:
        jobs: the suite's jobs (distinct hashes), in expansion order.
        skipped: hashes already done in the store before this run.
        not_applicable: jobs whose agent does not apply to their task, with
            the reason (not recorded in the store; see :class:`NotApplicable`).
        done: hashes that finished in this run.
        failed: results of the jobs that failed in this run.
        wall_seconds: duration of the call, seconds.
        needs: for each not-applicable job's hash, what its agent needs that
            the task lacks (:attr:`NotApplicable.needs`).
        left: with ``retry_failed``, the jobs neither done nor failed, which
            were not run.
    """

    jobs: list[Job]
    skipped: set[str] = field(default_factory=set)
    not_applicable: list[tuple[Job, str]] = field(default_factory=list)
    done: set[str] = field(default_factory=set)
    failed: list[JobResult] = field(default_factory=list)
    wall_seconds: float = 0.0
    needs: dict[str, str] = field(default_factory=dict)
    left: set[str] = field(default_factory=set)

    @property
    def ok(self) -> bool:
        return not self.failed


def git_revision() -> str | None:
    """The commit of the checkout this package runs from, if it is a git checkout."""
    folder = Path(__file__).resolve().parent
    try:
        output = subprocess.run(["git", "-C", str(folder), "rev-parse", "HEAD"],
                                capture_output=True, text=True, timeout=10, check=False)
    except (OSError, subprocess.SubprocessError):
        return None
    revision = output.stdout.strip()
    return revision if output.returncode == 0 and revision else None


def _check_whole(path: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ConfigError(path, value, f"a whole number >= {low}")
    return value


def check_run_options(workers: int | None, backend: str, address: str | None,
                      max_retries: int, job_timeout: float | None = None) -> tuple[int, int]:
    """(workers, max_retries) after checking every option of :func:`run_suite`.

    Raises ConfigError for a bad value, an address without the Ray backend,
    or the Ray backend without Ray installed.
    """
    check_choice("backend", backend, BACKENDS)
    workers = _check_whole("workers", (os.cpu_count() or 1) if workers is None else workers, 1)
    max_retries = _check_whole("max_retries", max_retries, 0)
    if job_timeout is not None:
        check_positive("job_timeout", job_timeout)
    if address is not None and backend != "ray":
        raise ConfigError("address", address, "no address unless backend is 'ray'")
    if backend == "ray":
        import_ray()
        if address is not None:
            check_reachable(address)
    return workers, max_retries


def check_reachable(address: str) -> None:
    """ConfigError unless a TCP connection to a ``host:port`` (or ``ray://host:port``)
    Ray address opens within 5 s.

    ``ray.init`` keeps retrying an address where nothing listens for minutes;
    this says so at once. Addresses of other forms (``auto``) are left to Ray.
    """
    host, _, port = address.removeprefix("ray://").rpartition(":")
    if not host or not port.isdigit():
        return
    try:
        socket.create_connection((host, int(port)), timeout=5.0).close()
    except OSError as error:
        raise ConfigError("address", address, "the address of a running Ray cluster, as "
                          f"`ray start --head` prints it (connecting failed: {error})") from error


def run_suite(suite: Suite, store: Store, *, workers: int | None = None,
              backend: str = "local", address: str | None = None,
              settings: RunSettings | None = None, max_retries: int = 2,
              progress: Progress | bool = False, progress_every: float | None = None,
              job_function: JobFunction = run_job, job_timeout: float | None = None,
              retry_failed: bool = False, allow_import: bool = False) -> RunSummary:
    """Run every job of ``suite`` not yet done in ``store``, recording each as it finishes.

    The run holds the store's lock (:class:`~needbench.benchmarks.lock.ResultsLock`)
    from before the first job until the last result is written, so a second
    run on the same store refuses to start.

    Args:
        suite: a parsed suite (``benchmarks.spec.parse_suite``).
        store: the results store; only this process writes to it.
        workers: worker processes (local) or CPUs of a new local Ray
            instance; default ``os.cpu_count()``.
        backend: 'local' or 'ray'.
        address: a Ray cluster to join (backend 'ray' only).
        settings: see :class:`RunSettings`.
        max_retries: runs of a job again after its worker process died or
            was lost (not after the job raised).
        progress: a :class:`Progress`, or True/False for one on stdout.
        progress_every: for ``progress=True``, None for a self-rewriting
            line (a terminal), or seconds between plain progress lines.
        job_function: what runs one job (a module-level function with the
            signature of :func:`run_job`, picklable by reference).
        job_timeout: seconds a job may run before its worker is stopped and
            it is recorded as failed (either backend); None for no limit.
        retry_failed: run only the jobs the store holds as failed (jobs
            never run are left for a plain rerun; see ``RunSummary.left``).
        allow_import: let the workers import the user's modules behind agents
            named ``module:Class`` and tasks named ``module:EnvId`` (which runs
            their code; the suite must have been loaded with the same
            permission, ``load_suite(..., allow_import=True)``).

    Raises:
        ConfigError: for a bad argument, backend 'ray' without Ray installed,
            a ``module:`` name without ``allow_import``, or a store another
            run holds or that cannot be written.
    """
    workers, max_retries = check_run_options(workers, backend, address, max_retries,
                                             job_timeout)
    settings = settings if settings is not None else RunSettings()
    settings = worker_settings(suite, settings, allow_import)
    with ResultsLock(store.path):
        return _run_locked(suite, store, workers, backend, address, settings, max_retries,
                           progress, progress_every, job_function, job_timeout, retry_failed)


def worker_settings(suite: Suite, settings: RunSettings, allow_import: bool) -> RunSettings:
    """``settings`` with what the workers need to find the suite's own agents and tasks.

    Raises ImportNotAllowed for a ``module:`` agent or task without
    ``allow_import``. Adds the folders of the imported modules and of the
    plug-in distributions the suite uses to ``import_paths``.
    """
    import dataclasses

    from needbench.agents.imports import is_import_form, module_root, require_import_allowed
    from needbench.agents.registry import agent_source

    allow_import = allow_import or settings.allow_import
    folders: list[str] = list(settings.import_paths)
    for i, task in enumerate(suite.tasks):
        if is_import_form(task.id):
            require_import_allowed(f"task[{i}].id", task.id, "task id", allow_import,
                                   context=suite.source)
            folders.append(module_root(task.id.partition(":")[0]) or "")
    for a, agent in enumerate(suite.agents):
        if is_import_form(agent.name):
            require_import_allowed(f"agent[{a}].name", agent.name, "agent name", allow_import,
                                   context=suite.source)
        try:
            source = agent_source(agent.name)
        except KeyError:
            continue  # an unknown name: the job reports it
        if source.folder:
            folders.append(source.folder)
    folders = [folder for folder in dict.fromkeys(folders) if folder]
    return dataclasses.replace(settings, allow_import=allow_import, import_paths=tuple(folders))


def _run_locked(suite: Suite, store: Store, workers: int, backend: str, address: str | None,
                settings: RunSettings, max_retries: int, progress: Progress | bool,
                progress_every: float | None, job_function: JobFunction,
                job_timeout: float | None, retry_failed: bool) -> RunSummary:
    clock = time.perf_counter()
    jobs = list({job.hash: job for job in expand(suite)}.values())
    completed = store.completed_hashes()
    summary = RunSummary(jobs=jobs, skipped={job.hash for job in jobs if job.hash in completed})
    pending = [job for job in jobs if job.hash not in completed]
    if retry_failed:
        failed = store.failed_hashes()
        summary.left = {job.hash for job in pending if job.hash not in failed}
        pending = [job for job in pending if job.hash in failed]
    if not isinstance(progress, Progress):
        progress = Progress(len(pending), len(summary.skipped), bool(progress),
                            every=progress_every)

    def record(result: JobResult | NotApplicable) -> None:
        if isinstance(result, NotApplicable):
            summary.not_applicable.append((Job(result.config), result.reason))
            summary.needs[result.hash] = result.needs or result.reason
            progress.update(result)
            return
        store.record_job(result)
        if result.status == "done":
            summary.done.add(result.hash)
        else:
            summary.failed.append(result)
        progress.update(result)

    progress.begin()
    try:
        if pending and backend == "local":
            _run_local(pending, settings, workers, max_retries, job_function, record,
                       progress.tick, job_timeout)
        elif pending:
            _run_ray(pending, settings, workers, address, max_retries, job_function, record,
                     progress.tick, job_timeout)
    finally:
        progress.close()
        summary.wall_seconds = time.perf_counter() - clock
    return summary
