"""The runner: one job end to end, failures, inapplicable pairs, worker deaths, resume."""

from __future__ import annotations

import importlib.util
import os
import sys
import textwrap

import numpy as np
import pytest

from needbench.agents.curves import EPISODE_RETURN, TIME_IN_BAND
from needbench.benchmarks import runner
from needbench.benchmarks.runner import (
    NotApplicable,
    Progress,
    RunSettings,
    run_job,
    run_suite,
)
from needbench.benchmarks.spec import Job, expand, parse_suite
from needbench.benchmarks.store import JobResult, Store
from needbench.envs.errors import ConfigError

SMALL_SUITE = """
[suite]
name = "runner-test"
seeds = [0, 1, 2]
eval_episodes = 3

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 40

[[agent]]
name = "tabular-q"
total_steps = 800
"""


def _job(agent: str = "tabular-q", task: str = "needbench/Menu-v0", seed: int = 0,
         hyperparameters: dict | None = None, total_steps: int = 800) -> Job:
    return Job({"suite": "runner-test", "seed": seed, "eval_episodes": 3, "gamma": 0.9,
                "task": {"id": task, "kwargs": {"max_steps": 40}},
                "agent": {"name": agent, "total_steps": total_steps,
                          "hyperparameters": hyperparameters or {}},
                "sweep": {}})


def _scalar_events(folder) -> dict[str, list[tuple[int, float]]]:
    """Every scalar series in a folder of event files, read as TensorBoard's UI reads them.

    Source: TensorBoard's own reader (plugin_event_accumulator, which turns both the
    legacy scalar summaries of torch's SummaryWriter and TensorBoard's own tensor
    summaries into tensors of the 'scalars' plugin).
    """
    from tensorboard.backend.event_processing.plugin_event_accumulator import EventAccumulator
    from tensorboard.util import tensor_util

    events = EventAccumulator(str(folder))
    events.Reload()
    series = {}
    for tag in events.Tags()["tensors"]:
        assert events.SummaryMetadata(tag).plugin_data.plugin_name == "scalars"
        series[tag] = [(event.step, float(tensor_util.make_ndarray(event.tensor_proto)))
                       for event in events.Tensors(tag)]
    return series


def test_a_job_learns_evaluates_and_writes_tensorboard_scalars(tmp_path):
    job = _job()
    result = run_job(job.config, job.hash, RunSettings(tensorboard_root=str(tmp_path),
                                                       keep_traces=2))
    assert result.status == "done", result.error
    assert len(result.episodes) == 3 and len(result.traces) == 2
    assert all(episode["length"] == 40 for episode in result.episodes)
    tags = {tag for _, tag, _ in result.curves}
    assert {EPISODE_RETURN, TIME_IN_BAND} <= tags
    # The stored trace and the episode's metrics agree on the return.
    assert result.episodes[0]["return"] == pytest.approx(float(result.traces[0]["reward"].sum()))

    (folder,) = tmp_path.iterdir()
    assert folder.name.endswith(job.hash[:8]) and "tabular-q" in folder.name
    series = _scalar_events(folder)
    assert {"eval/return", "eval/discounted_drive", "eval/time_in_band", "eval/survival",
            "eval/deviation/energy", "eval/deviation/water",
            EPISODE_RETURN} <= set(series)
    ((step, value),) = series["eval/return"]
    assert step == 800
    # Common practice, no source: the evaluation scalar is the mean over episodes.
    expected = np.mean([episode["return"] for episode in result.episodes])
    assert value == pytest.approx(expected, rel=1e-6)  # event files hold float32
    logged = [(step, value) for step, tag, value in result.curves
              if tag == EPISODE_RETURN]
    assert [s for s, _ in series[EPISODE_RETURN]] == [s for s, _ in logged]
    assert [v for _, v in series[EPISODE_RETURN]] == pytest.approx(
        [v for _, v in logged], rel=1e-6)


def test_the_logger_writes_with_either_writer(tmp_path, monkeypatch):
    from needbench.benchmarks import tensorboard

    for backend in ("torch", "tensorboard"):
        monkeypatch.setattr(tensorboard, "writer_backend", lambda backend=backend: backend)
        with tensorboard.RunLogger(tmp_path / backend) as logger:
            assert logger.backend == backend and logger.tensorboard_dir == str(tmp_path / backend)
            logger.log_scalar("update/value", 0.25, 7)
        assert _scalar_events(tmp_path / backend) == {"update/value": [(7, 0.25)]}
    monkeypatch.setattr(tensorboard, "writer_backend", lambda: None)
    logger = tensorboard.RunLogger(tmp_path / "none")
    logger.log_scalar("update/value", 0.5, 1)
    logger.close()
    assert logger.tensorboard_dir is None and logger.curves == [(1, "update/value", 0.5)]
    assert not (tmp_path / "none").exists()


def test_a_deep_job_writes_one_run_with_our_scalar_names_only(tmp_path):
    pytest.importorskip("stable_baselines3")
    job = _job(agent="ppo", hyperparameters={"n_steps": 32, "batch_size": 32, "n_epochs": 1,
                                             "n_envs": 2}, total_steps=256)
    result = run_job(job.config, job.hash, RunSettings(tensorboard_root=str(tmp_path)))
    assert result.status == "done", result.error
    (folder,) = tmp_path.iterdir()
    # One run per job: event files in the job's folder, no run nested inside it.
    assert all(entry.is_file() for entry in folder.iterdir())
    tags = set(_scalar_events(folder))
    assert {EPISODE_RETURN, "episode/length", TIME_IN_BAND, "update/value_loss",
            "eval/return"} <= tags
    assert {tag.split("/")[0] for tag in tags} <= {"episode", "stability", "update", "eval"}
    # The curves the store keeps are the event file's, and deep runs log episode lengths.
    assert {tag for _, tag, _ in result.curves} == tags - {t for t in tags
                                                           if t.startswith("eval/")}


def test_a_job_that_raises_comes_back_failed_with_its_traceback():
    # 4096 bins per internal need make a table too large: tabular-q refuses it in learn().
    job = _job(hyperparameters={"internal_bins": 4096})
    result = run_job(job.config, job.hash, RunSettings())
    assert result.status == "failed"
    assert "Traceback" in result.error and "state count" in result.error
    assert result.episodes == [] and result.traces == []


def test_inapplicable_pairs_are_told_apart_from_broken_jobs(tmp_path):
    settings = RunSettings(tensorboard_root=str(tmp_path))
    # Continuous actions: tabular-q's constructor rejects the action space.
    arena = _job(task="needbench/Arena-v0")
    outcome = run_job(arena.config, arena.hash, settings)
    assert isinstance(outcome, NotApplicable) and "action_space" in outcome.reason
    # No finite model of the oasis garden: the planner's learn() says so.
    forage = _job(agent="exact-planner", task="needbench/Forage-v0", total_steps=0)
    outcome = run_job(forage.config, forage.hash, settings)
    assert isinstance(outcome, NotApplicable) and outcome.hash == forage.hash
    assert list(tmp_path.iterdir()) == []  # no event files left for either
    # A misspelt hyperparameter is the job's own failure, not inapplicability.
    typo = _job(hyperparameters={"learning_rte": 0.1})
    outcome = run_job(typo.config, typo.hash, settings)
    assert isinstance(outcome, JobResult) and outcome.status == "failed"
    assert "learning_rte" in outcome.error


def test_run_suite_records_every_job_once_and_resumes(tmp_path):
    suite = parse_suite(SMALL_SUITE)
    with Store(tmp_path / "results.sqlite3") as store:
        first = run_suite(suite, store, workers=2)
        assert first.ok and len(first.done) == 3 and not first.skipped
        runs = store.runs()
        assert {run["hash"] for run in runs} == {job.hash for job in expand(suite)}
        assert all(run["status"] == "done" for run in runs)
        assert len(store.episodes()) == 9
        again = run_suite(suite, store, workers=2)
        assert again.skipped == first.done and not again.done
        assert len(store.runs()) == 3 and len(store.episodes()) == 9


def test_run_suite_lists_inapplicable_jobs_without_running_them(tmp_path):
    suite = parse_suite(SMALL_SUITE.replace('id = "needbench/Menu-v0"', 'id = "needbench/Arena-v0"')
                        .replace("max_steps = 40", "max_steps = 20"))
    with Store(tmp_path / "results.sqlite3") as store:
        summary = run_suite(suite, store, workers=1)
        assert len(summary.not_applicable) == 3 and summary.ok
        assert store.runs() == []


CRASHING_MODULE = """
import os

from needbench.benchmarks.runner import run_job


def crash_on_seed_1(config, job_hash, settings):
    if config["seed"] == 1:
        os._exit(17)  # the worker dies as if killed, without a Python exception
    return run_job(config, job_hash, settings)
"""


def test_a_dying_worker_fails_only_its_own_job(tmp_path, monkeypatch):
    (tmp_path / "crashing_jobs.py").write_text(textwrap.dedent(CRASHING_MODULE))
    monkeypatch.syspath_prepend(str(tmp_path))  # spawned workers inherit sys.path
    import crashing_jobs

    suite = parse_suite(SMALL_SUITE)
    with Store(tmp_path / "results.sqlite3") as store:
        summary = run_suite(suite, store, workers=1, max_retries=1,
                            job_function=crashing_jobs.crash_on_seed_1)
        status = {run["seed"]: run["status"] for run in store.runs()}
        assert status == {0: "done", 1: "failed", 2: "done"}
        (failed,) = summary.failed
        assert "died 2 times" in failed.error
    sys.modules.pop("crashing_jobs", None)


def test_bad_arguments_are_config_errors(tmp_path, monkeypatch):
    suite = parse_suite(SMALL_SUITE)
    with Store(tmp_path / "results.sqlite3") as store:
        with pytest.raises(ConfigError, match="workers"):
            run_suite(suite, store, workers=0)
        with pytest.raises(ConfigError, match="backend"):
            run_suite(suite, store, backend="threads")
        with pytest.raises(ConfigError, match="address"):
            run_suite(suite, store, address="127.0.0.1:6379")
        if importlib.util.find_spec("ray") is not None:
            # Port 1 of the loopback address: nothing listens there.
            with pytest.raises(ConfigError, match="running Ray cluster"):
                run_suite(suite, store, backend="ray", address="127.0.0.1:1")
        monkeypatch.setitem(sys.modules, "ray", None)  # as if Ray were not installed
        with pytest.raises(ConfigError, match="pip install"):
            run_suite(suite, store, backend="ray")
        assert store.runs() == []


def test_limit_threads_caps_the_thread_libraries(monkeypatch):
    for variable in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
        monkeypatch.delenv(variable, raising=False)
    runner.limit_threads()
    assert os.environ["OMP_NUM_THREADS"] == "1" and os.environ["OPENBLAS_NUM_THREADS"] == "1"


def test_progress_line_counts_and_estimates(monkeypatch):
    clock = iter([100.0, 130.0, 160.0])
    monkeypatch.setattr(runner.time, "perf_counter", lambda: next(clock))
    progress = Progress(total=4, skipped=2, enabled=False)
    job = _job()
    for status in ("done", "failed"):
        progress.update(JobResult(hash=job.hash, config=job.config, status=status, started=0.0,
                                  finished=1.0, wall_seconds=1.0, error="boom"))
    # 2 of 4 jobs took 30 s: the other 2 are estimated at 30 s more.
    assert progress.line() == ("[2/4] 1 done, 1 failed, 2 already done | elapsed 0m30s"
                               " | ETA 0m30s")


def test_progress_off_a_terminal_prints_plain_lines_now_and_then(monkeypatch):
    import io

    # perf_counter readings: start, then one per update / line written.
    now = [0.0]
    monkeypatch.setattr(runner.time, "perf_counter", lambda: now[0])
    stream = io.StringIO()
    progress = Progress(total=3, skipped=0, enabled=True, stream=stream, every=10.0)
    progress.begin()
    job = _job()
    result = JobResult(hash=job.hash, config=job.config, status="done", started=0.0,
                       finished=1.0, wall_seconds=1.0)
    for moment in (2.0, 5.0):
        now[0] = moment
        progress.update(result)
    # While a long job runs, the backend's ticks still print a line every 10 s.
    for moment in (8.0, 12.5, 13.0):
        now[0] = moment
        progress.tick()
    now[0] = 14.0
    progress.update(result)
    progress.close()
    lines = stream.getvalue().splitlines()
    # A line at the first job, none 3 s or 6 s later, one at 12.5 s, a last one at the end;
    # no terminal control codes.
    assert lines == ["progress [1/3] 1 done, 0 failed | elapsed 0m02s | ETA 0m04s",
                     "progress [2/3] 2 done, 0 failed | elapsed 0m12s | ETA 0m06s",
                     "progress [3/3] 3 done, 0 failed | elapsed 0m14s | ETA 0m00s"]
    assert "\r" not in stream.getvalue()


@pytest.mark.parametrize("agent, task", [
    ("tabular-q", "needbench/Arena-v0"), ("exact-planner", "needbench/Forage-v0"),
    ("setpoint-controller", "CartPole-v1"), ("sac", "needbench/Menu-v0"),
    ("dqn", "needbench/Arena-v0"),
])
def test_agents_say_not_applicable_for_tasks_outside_their_reach(agent, task):
    import gymnasium as gym

    from needbench.agents import make_agent
    from needbench.agents.base import NotApplicableError

    env = gym.make(task)
    with pytest.raises(NotApplicableError):
        make_agent(agent, env.observation_space, env.action_space).learn(env, 10, seed=0)


def test_a_rerun_replaces_the_event_folder_of_its_job(tmp_path):
    # Issue 11, item 10: killed runs left partial event files beside the complete ones.
    job = _job(total_steps=200)
    settings = RunSettings(tensorboard_root=str(tmp_path))
    assert run_job(job.config, job.hash, settings).status == "done"
    (folder,) = tmp_path.iterdir()
    (folder / "events.out.tfevents.0.partial-from-a-killed-run").write_bytes(b"\0")
    assert run_job(job.config, job.hash, settings).status == "done"
    assert [path.parent for path in tmp_path.rglob("*") if path.is_file()] == [folder]
    assert _scalar_events(folder)  # the one file left is the new run's, and reads
