"""Reliability: worker faults, one run per store, a driver killed and resumed.

The figures the README's Reliability section quotes come from these tests:
faults injected (``FAULTS``), kill points tried (``KILL_POINTS``), rows lost.
"""

from __future__ import annotations

import errno
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from needbench.benchmarks import lock as lock_module
from needbench.benchmarks.cli import main
from needbench.benchmarks.lock import ResultsLock
from needbench.benchmarks.runner import run_suite
from needbench.benchmarks.spec import expand, parse_suite
from needbench.benchmarks.store import Store

# A test-only agent that misbehaves on seed 1 as NEEDBENCH_TEST_FAULT says, while the
# file NEEDBENCH_TEST_FAULT_WHILE exists (when set). It is registered only in the worker
# processes of these tests: unpickling the job function imports this module there.
FAULTY_MODULE = """
import os
import signal
import time

from needbench.agents.random_agent import RandomAgent
from needbench.agents.registry import AGENTS, register_agent
from needbench.benchmarks.runner import run_job


class FaultyAgent(RandomAgent):
    name = "faulty"

    def learn(self, env, total_steps, seed, logger=None):
        marker = os.environ.get("NEEDBENCH_TEST_FAULT_WHILE")
        if seed == 1 and (marker is None or os.path.exists(marker)):
            fault = os.environ["NEEDBENCH_TEST_FAULT"]
            if fault == "raise":
                raise RuntimeError("the faulty agent fell over on purpose")
            if fault == "hang":
                time.sleep(3600)
            if fault == "exit":
                os._exit(3)
            if fault == "sigkill":
                os.kill(os.getpid(), signal.SIGKILL)
        return super().learn(env, total_steps, seed, logger)


def run_faulty_job(config, job_hash, settings):
    if "faulty" not in AGENTS:
        register_agent("faulty", FaultyAgent)
    return run_job(config, job_hash, settings)
"""

FAULT_SUITE = """
[suite]
name = "fault-test"
seeds = [0, 1, 2]
eval_episodes = 2

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 20

[[agent]]
name = "faulty"
total_steps = 0
"""

# fault -> what the failed record's error must say.
FAULTS = {
    "raise": "the faulty agent fell over on purpose",
    "hang": "timed out: the job ran longer than job_timeout = 6 s",
    "exit": "it exited with code 3",
    "sigkill": "it was killed by signal 9 (SIGKILL)",
}


@pytest.fixture
def faulty_jobs(tmp_path, monkeypatch):
    (tmp_path / "faulty_jobs.py").write_text(textwrap.dedent(FAULTY_MODULE))
    monkeypatch.syspath_prepend(str(tmp_path))  # spawned workers inherit sys.path
    import faulty_jobs

    yield faulty_jobs.run_faulty_job
    sys.modules.pop("faulty_jobs", None)


@pytest.mark.parametrize("fault", sorted(FAULTS))
def test_a_faulty_job_is_recorded_failed_with_its_reason_and_the_others_finish(
        fault, faulty_jobs, tmp_path, monkeypatch):
    monkeypatch.setenv("NEEDBENCH_TEST_FAULT", fault)
    suite = parse_suite(FAULT_SUITE)
    with Store(tmp_path / "results.sqlite3") as store:
        started = time.monotonic()
        summary = run_suite(suite, store, workers=2, max_retries=0, job_timeout=6.0,
                            job_function=faulty_jobs)
        status = {run["seed"]: run["status"] for run in store.runs()}
        assert status == {0: "done", 1: "failed", 2: "done"}
        (failed,) = summary.failed
        assert FAULTS[fault] in failed.error
        assert store.runs(status="failed")[0]["error"] == failed.error
    assert time.monotonic() - started < 120


def test_retry_failed_runs_only_the_failed_jobs(faulty_jobs, tmp_path, monkeypatch):
    marker = tmp_path / "still-broken"
    marker.touch()
    monkeypatch.setenv("NEEDBENCH_TEST_FAULT", "raise")
    monkeypatch.setenv("NEEDBENCH_TEST_FAULT_WHILE", str(marker))
    with Store(tmp_path / "results.sqlite3") as store:
        first = run_suite(parse_suite(FAULT_SUITE), store, workers=1, job_function=faulty_jobs)
        assert len(first.failed) == 1 and len(first.done) == 2
        marker.unlink()  # the fault is fixed; a new seed joins the suite
        grown = parse_suite(FAULT_SUITE.replace("seeds = [0, 1, 2]", "seeds = [0, 1, 2, 3]"))
        by_seed = {job.seed: job.hash for job in expand(grown)}
        retry = run_suite(grown, store, workers=1, job_function=faulty_jobs, retry_failed=True)
        assert retry.done == {by_seed[1]} and retry.left == {by_seed[3]}
        assert retry.skipped == {by_seed[0], by_seed[2]} and retry.ok
        assert {run["seed"]: run["status"] for run in store.runs()} == \
            {0: "done", 1: "done", 2: "done"}
        (history,) = store.failed_attempts()
        assert history["hash"] == by_seed[1] and "on purpose" in history["error"]


DRIVER = """
import sys
sys.path.insert(0, sys.argv[1])
import faulty_jobs
from needbench.benchmarks.runner import run_suite
from needbench.benchmarks.spec import parse_suite
from needbench.benchmarks.store import Store
suite = parse_suite(open(sys.argv[2]).read())
run_suite(suite, Store(sys.argv[3]), workers=1, job_function=faulty_jobs.run_faulty_job)
"""


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="needs Linux /proc")
def test_workers_end_with_their_killed_driver(faulty_jobs, tmp_path, monkeypatch):
    # Issue 11, item 9: a hung job's worker ran on after its driver was killed.
    monkeypatch.setenv("NEEDBENCH_TEST_FAULT", "hang")
    suite = tmp_path / "hang.toml"
    suite.write_text(FAULT_SUITE.replace("seeds = [0, 1, 2]", "seeds = [1]"))
    driver = subprocess.Popen([sys.executable, "-c", DRIVER, str(tmp_path), str(suite),
                               str(tmp_path / "results.sqlite3")])
    try:
        deadline = time.monotonic() + 60
        while not _children(driver.pid):
            assert driver.poll() is None and time.monotonic() < deadline
            time.sleep(0.1)
        time.sleep(3.0)  # the worker is importing or already hanging in the job
        workers = _children(driver.pid)
        assert driver.poll() is None  # the job hangs: the driver waits for it
    finally:
        driver.kill()  # SIGKILL: the driver cannot stop its workers itself
        driver.wait()
    deadline = time.monotonic() + 5.0  # the job alone would hang for an hour
    while any(_running(pid) for pid in workers):
        assert time.monotonic() < deadline, "a worker outlived its killed driver"
        time.sleep(0.1)


# ----------------------------------------------------------------------------
# The results folder
# ----------------------------------------------------------------------------

SMALL_SUITE = FAULT_SUITE.replace("seeds = [0, 1, 2]", "seeds = [0]").replace(
    'name = "faulty"', 'name = "random"')

HOLDER = """
import sys, time
from needbench.benchmarks.lock import ResultsLock
with ResultsLock(sys.argv[1]):
    print("held", flush=True)
    time.sleep(600)
"""


def test_a_second_run_on_a_store_in_use_refuses_and_names_the_holder(tmp_path, capsys):
    suite = tmp_path / "suite.toml"
    suite.write_text(SMALL_SUITE)
    out = tmp_path / "out"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(out / "results.sqlite3")],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        assert main(["run", str(suite), "--out", str(out), "--quiet"]) == 2
        err = capsys.readouterr().err
        assert f"PID {holder.pid} on " in err and "Traceback" not in err
        assert not (out / "results.sqlite3").exists()  # refused before the store was opened
    finally:
        holder.kill()
        holder.wait()
    # The holder died with its lock file in place: the next run takes the stale lock over.
    assert (out / "results.sqlite3.lock").read_text().split()[0] == str(holder.pid)
    assert main(["run", str(suite), "--out", str(out), "--quiet"]) == 0
    assert not (out / "results.sqlite3.lock").exists()
    with Store(out / "results.sqlite3") as store:
        assert [run["status"] for run in store.runs()] == ["done"]


def test_the_lock_is_reentrant_in_one_process_and_exclusive_across_processes(tmp_path):
    path = tmp_path / "results.sqlite3"
    with ResultsLock(path), ResultsLock(path):
        assert (tmp_path / "results.sqlite3.lock").exists()
        other = subprocess.run([sys.executable, "-c", HOLDER.replace("time.sleep(600)", ""),
                                str(path)], capture_output=True, text=True)
        assert other.returncode != 0 and f"PID {os.getpid()}" in other.stderr
    assert not (tmp_path / "results.sqlite3.lock").exists()


@pytest.mark.parametrize("code, words", [(errno.EROFS, "read-only"), (errno.ENOSPC, "full"),
                                         (errno.EACCES, "no permission")])
def test_an_unwritable_folder_is_a_clear_error_before_any_job(code, words, tmp_path, capsys,
                                                               monkeypatch):
    # Tests run as root here, where chmod cannot make a folder read-only: the refusal
    # the file system would give is injected at the one call that writes first.
    real_open = os.open

    def refusing_open(path, *args, **kwargs):
        if str(path).endswith(".lock"):
            raise OSError(code, os.strerror(code), str(path))
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(lock_module.os, "open", refusing_open)
    suite = tmp_path / "suite.toml"
    suite.write_text(SMALL_SUITE)
    assert main(["run", str(suite), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "a folder this user can write to" in err and words in err
    assert not (tmp_path / "out" / "results.sqlite3").exists()


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_folder_is_a_clear_error(tmp_path, capsys):
    suite = tmp_path / "suite.toml"
    suite.write_text(SMALL_SUITE)
    out = tmp_path / "out"
    out.mkdir()
    out.chmod(0o555)
    try:
        assert main(["run", str(suite), "--out", str(out), "--quiet"]) == 2
        assert "no permission" in capsys.readouterr().err
    finally:
        out.chmod(0o755)


# ----------------------------------------------------------------------------
# The driver killed with SIGKILL at several moments, then resumed
# ----------------------------------------------------------------------------

KILL_SUITE = """
[suite]
name = "kill-test"
seeds = [0, 1, 2, 3, 4, 5]
eval_episodes = 4

[[task]]
id = "needbench/Menu-v0"

[[agent]]
name = "tabular-q"
total_steps = 16000
"""
KILL_JOBS = 6

# (jobs recorded, then seconds more) before each SIGKILL of the driver alone:
# during start-up, right after a commit, and twice in the middle of a job.
KILL_POINTS = ((0, 0.5), (1, 0.0), (2, 1.0), (4, 0.3))


def _count_done(path: Path) -> int:
    if not path.exists():
        return 0
    try:
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=1.0) as connection:
            return connection.execute("SELECT count(*) FROM runs WHERE status = 'done'"
                                      ).fetchone()[0]
    except sqlite3.OperationalError:  # the schema is not written yet
        return 0


def _children(pid: int) -> set[int]:
    """The child processes of ``pid`` (Linux /proc)."""
    children: set[int] = set()
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            children |= {int(c) for c in (task / "children").read_text().split()}
        except OSError:
            pass
    return children


def _running(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state not in ("Z", "X")


def _metrics(path: Path) -> dict[tuple[str, int], dict[str, float]]:
    with Store(path) as store:
        return {(row["hash"], row["episode"]): row["metrics"] for row in store.episodes()}


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="needs Linux /proc")
def test_a_driver_killed_at_several_moments_resumes_with_nothing_lost_or_doubled(tmp_path):
    suite = tmp_path / "kill.toml"
    suite.write_text(KILL_SUITE)
    reference, out = tmp_path / "reference", tmp_path / "out"
    assert main(["run", str(suite), "--out", str(reference), "--workers", "1", "--quiet"]) == 0
    store_path = out / "results.sqlite3"
    command = [sys.executable, "-m", "needbench.benchmarks.cli", "run", str(suite), "--out",
               str(out), "--workers", "1", "--quiet"]
    kills = 0
    for recorded, delay in KILL_POINTS:
        process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + 240
        while _count_done(store_path) < recorded:
            assert process.poll() is None, process.stderr.read().decode()
            assert time.monotonic() < deadline, "no job was recorded in time"
            time.sleep(0.05)
        time.sleep(delay)
        if process.poll() is not None:  # finished before the kill: nothing left to try
            break
        workers = _children(process.pid)
        process.send_signal(signal.SIGKILL)  # the driver alone, not its process group
        process.wait(timeout=30)
        process.stderr.close()
        kills += 1
        # Issue 11, item 9: the pool's workers end with their driver.
        deadline = time.monotonic() + 15
        while any(_running(pid) for pid in workers):
            assert time.monotonic() < deadline, "a worker outlived its killed driver"
            time.sleep(0.1)
    assert kills == len(KILL_POINTS), "the run finished before every kill; lengthen its jobs"
    assert 1 <= _count_done(store_path) < KILL_JOBS
    with Store(store_path) as store:
        before = {run["hash"]: run["started"] for run in store.runs()}

    assert main(["run", str(suite), "--out", str(out), "--workers", "1", "--quiet"]) == 0

    jobs = expand(parse_suite(KILL_SUITE))
    with sqlite3.connect(store_path) as connection:
        assert connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = connection.execute("SELECT hash, status FROM runs").fetchall()
        assert sorted(h for h, _ in rows) == sorted(job.hash for job in jobs)
        assert all(status == "done" for _, status in rows)
        assert connection.execute("SELECT count(*) FROM episodes").fetchone()[0] == \
            KILL_JOBS * 4
    with Store(store_path) as store:
        after = {run["hash"]: run["started"] for run in store.runs()}
    assert all(after[h] == started for h, started in before.items())  # not run twice
    # Every metric of every episode equals the uninterrupted run's: no row lost or changed.
    assert _metrics(store_path) == _metrics(reference / "results.sqlite3")
    # Issue 11, item 10: one event folder per job, each with one event file.
    folders = sorted((out / "tensorboard").iterdir())
    assert len(folders) == KILL_JOBS
    assert all(len(list(folder.iterdir())) == 1 for folder in folders)
