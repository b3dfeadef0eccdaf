"""The command line end to end: run (local, Ray, resumed), results, list, describe,
watch, the built-in suites, and the exit codes (a killed run: tests/test_reliability.py)."""

from __future__ import annotations

import csv
import json
import sys
from pathlib import Path

import gymnasium as gym
import numpy as np
import pytest
from scipy import stats

import needbench.envs
from needbench.agents.registry import AGENTS
from needbench.benchmarks.cli import builtin_suites, load_suite, main, parse_settings
from needbench.benchmarks.runner import run_suite
from needbench.benchmarks.spec import parse_suite
from needbench.benchmarks.store import Store
from needbench.benchmarks.table import Cell, format_table

# Menu with deterministic agents (tabular-q acts greedily; random is seeded by learn)
# and Arena, where tabular-q does not apply (continuous actions) and is not run.
SUITE = """
[suite]
name = "cli-test"
seeds = [0, 1, 2, 3]
eval_episodes = 3

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 40

[[task]]
id = "needbench/Arena-v0"
[task.kwargs]
max_steps = 30

[[agent]]
name = "random"
total_steps = 0

[[agent]]
name = "tabular-q"
total_steps = 800
"""

SUITE_JOBS = 12  # Menu x 2 agents x 4 seeds + Arena x random x 4 seeds


def _write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text)
    return path


def _episode_metrics(out: Path) -> dict[tuple[str, int], dict[str, float]]:
    with Store(out / "results.sqlite3") as store:
        return {(row["hash"], row["episode"]): row["metrics"] for row in store.episodes()}


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    """The suite run once through the command line with the local process pool."""
    folder = tmp_path_factory.mktemp("local")
    suite = _write(folder, "suite.toml", SUITE)
    code = main(["run", str(suite), "--out", str(folder / "out"), "--workers", "2"])
    return folder / "out", code


def test_run_writes_store_csv_tensorboard_and_table(local_run, capsys):
    out, code = local_run
    assert code == 0
    with Store(out / "results.sqlite3") as store:
        runs = store.runs()
        assert len(runs) == SUITE_JOBS and all(run["status"] == "done" for run in runs)
        assert {(run["task_id"], run["agent"]) for run in runs} == {
            ("needbench/Menu-v0", "random"), ("needbench/Menu-v0", "tabular-q"),
            ("needbench/Arena-v0", "random")}
    with (out / "runs.csv").open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == SUITE_JOBS and {"return", "discounted_drive", "survival"} <= set(rows[0])
    assert len(list((out / "tensorboard").iterdir())) == SUITE_JOBS

    assert main(["results", str(out), "--json"]) == 0
    cells = json.loads(capsys.readouterr().out)
    assert len(cells) == 3 and all(cell["runs"] == 4 for cell in cells)
    # Source: scipy.stats.trim_mean(x, 0.25) is the interquartile mean; each run scores
    # the mean (numpy) of its evaluation episodes.
    by_run: dict[str, list[float]] = {}
    for (run_hash, _), metrics in _episode_metrics(out).items():
        by_run.setdefault(run_hash, []).append(metrics["return"])
    with Store(out / "results.sqlite3") as store:
        for cell in cells:
            hashes = [run["hash"] for run in store.runs(task_id=cell["task"], agent=cell["agent"])]
            scores = [np.mean(by_run[h]) for h in hashes]
            assert cell["return"]["iqm"] == pytest.approx(stats.trim_mean(scores, 0.25))
            assert cell["return"]["low"] <= cell["return"]["iqm"] <= cell["return"]["high"]
            drive = cell["discounted_drive"]
            assert drive["low"] <= drive["iqm"] <= drive["high"] and not drive["higher_is_better"]

    assert main(["results", str(out)]) == 0
    table = capsys.readouterr().out
    assert "return IQM [95% CI]" in table and "time in band" in table and "Arena-v0" in table
    assert main(["results", str(out), "--csv"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 4 and lines[0].startswith("suite,task,agent,sweep,runs,failed,return_iqm")


def test_rerun_skips_what_is_done(local_run, capsys):
    out, _ = local_run
    before = {run["hash"]: run["finished"] for run in Store(out / "results.sqlite3").runs()}
    suite = out.parent / "suite.toml"
    assert main(["run", str(suite), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert f"0 done now, {SUITE_JOBS} already done" in printed
    assert f"{SUITE_JOBS} jobs already done in {out / 'results.sqlite3'} were not run again" \
        in printed
    assert "1 agent-task pair not applicable (the agent cannot act on that task), 4 jobs not " \
        "run; --verbose lists them" in printed
    assert main(["run", str(suite), "--out", str(out), "--verbose"]) == 0
    printed = capsys.readouterr().out
    assert "  tabular-q on Arena-v0: the agent needs a Discrete space" in printed
    after = {run["hash"]: run["finished"] for run in Store(out / "results.sqlite3").runs()}
    assert after == before


@pytest.mark.ray
def test_ray_backend_stores_the_same_metrics(local_run, ray_session, tmp_path):
    out, _ = local_run
    code = main(["run", str(out.parent / "suite.toml"), "--out", str(tmp_path / "ray"),
                 "--backend", "ray", "--quiet"])
    assert code == 0
    local, remote = _episode_metrics(out), _episode_metrics(tmp_path / "ray")
    assert len(local) == SUITE_JOBS * 3
    assert remote == local


CRASHING_MODULE = """
import os

from needbench.benchmarks.runner import run_job


def crash_on_seed_1(config, job_hash, settings):
    if config["seed"] == 1:
        os._exit(17)  # the worker dies as if killed, without a Python exception
    return run_job(config, job_hash, settings)
"""


@pytest.mark.ray
def test_a_lost_ray_worker_fails_only_its_own_job(ray_session, tmp_path, monkeypatch):
    (tmp_path / "crashing_ray_jobs.py").write_text(CRASHING_MODULE)
    monkeypatch.syspath_prepend(str(tmp_path))
    import crashing_ray_jobs

    # Ray's workers cannot import the module from tmp_path: send the function itself.
    ray_session.cloudpickle.register_pickle_by_value(crashing_ray_jobs)
    suite = parse_suite(SUITE.replace("seeds = [0, 1, 2, 3]", "seeds = [0, 1, 2]")
                        .replace('id = "needbench/Arena-v0"', 'id = "needbench/Gamble-v0"'))
    try:
        with Store(tmp_path / "results.sqlite3") as store:
            summary = run_suite(suite, store, backend="ray", max_retries=1,
                                job_function=crashing_ray_jobs.crash_on_seed_1)
            status = {(run["task_id"], run["agent"], run["seed"]): run["status"]
                      for run in store.runs()}
    finally:
        ray_session.cloudpickle.unregister_pickle_by_value(crashing_ray_jobs)
        sys.modules.pop("crashing_ray_jobs", None)
    assert len(status) == 12
    assert all((state == "failed") == (seed == 1) for (_, _, seed), state in status.items())
    assert len(summary.failed) == 4 and all("Traceback" in r.error for r in summary.failed)


def test_a_failing_job_is_recorded_and_the_exit_code_is_1(tmp_path, capsys):
    # One sweep of value iteration cannot reach the planner's tolerance: learn() raises,
    # a failure only running the job can show.
    suite = _write(tmp_path, "failing.toml", SUITE.replace(
        'name = "tabular-q"\ntotal_steps = 800',
        'name = "exact-planner"\ntotal_steps = 0\n[agent.hyperparameters]\n'
        'max_iterations = 1'))
    code = main(["run", str(suite), "--out", str(tmp_path / "out"), "--workers", "2"])
    assert code == 1
    assert "failed: needbench/Menu-v0 exact-planner seed=0" in capsys.readouterr().err
    with Store(tmp_path / "out" / "results.sqlite3") as store:
        failed = store.runs(status="failed")
        assert len(failed) == 4 and all("max_iterations" in run["error"] for run in failed)
        assert len(store.runs(status="done")) == 8


def test_a_setting_that_cannot_fit_the_task_stops_the_run_before_it_starts(tmp_path, capsys):
    # 4096 bins per internal need make a table too large for Menu's spaces.
    suite = _write(tmp_path, "oversized.toml", SUITE.replace(
        "total_steps = 800", "total_steps = 800\n[agent.hyperparameters]\ninternal_bins = 4096"))
    assert main(["run", str(suite), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert str(suite) in err and "agent[1].hyperparameters" in err and "state count" in err
    assert not (tmp_path / "out").exists()


def test_bad_input_exits_with_2_and_no_traceback(tmp_path, capsys, monkeypatch):
    def error_of(arguments):
        assert main(arguments) == 2
        err = capsys.readouterr().err
        assert "Traceback" not in err
        return err

    assert "did you mean 'quickstart'" in error_of(["run", "quickstrat"])
    bad = _write(tmp_path, "bad.toml", SUITE.replace("eval_episodes = 3", "eval_episodes = 0"))
    assert "suite.eval_episodes = 0" in error_of(["run", str(bad)])
    typo = _write(tmp_path, "typo.toml", SUITE.replace('name = "tabular-q"', 'name = "tabular"'))
    assert "agent[1].name" in error_of(["run", str(typo)])
    assert "--workers" in error_of(["run", "quickstart", "--workers", "0"])
    good = _write(tmp_path, "good.toml", SUITE)
    assert "address" in error_of(["run", str(good), "--out", str(tmp_path / "o"),
                                  "--address", "127.0.0.1:6379"])
    monkeypatch.setitem(sys.modules, "ray", None)  # as if Ray were not installed
    assert "pip install" in error_of(["run", str(good), "--out", str(tmp_path / "o"),
                                      "--backend", "ray"])
    assert "Nowhere" in error_of(["describe", "Nowhere"])
    assert "nobody" in error_of(["watch", "Menu", "--agent", "nobody"])
    assert "results" in error_of(["results", str(tmp_path / "empty")])
    assert not (tmp_path / "o" / "results.sqlite3").exists()
    # Issue 11, items 1, 2, 3 and 11: each was a traceback and exit 1, or no error at all.
    not_sqlite = _write(tmp_path, "x.sqlite3", "hello\n")
    assert "a needbench results store" in error_of(["results", str(not_sqlite)])
    assert f"--out = '{not_sqlite}'" in error_of(["run", str(good), "--out", str(not_sqlite)])
    huge_seed = _write(tmp_path, "seed.toml", SUITE.replace("seeds = [0, 1, 2, 3]",
                                                            "seeds = [9223372036854775808]"))
    err = error_of(["run", str(huge_seed), "--out", str(tmp_path / "s")])
    assert "suite.seeds[0] = 9223372036854775808" in err and "[0, 4294967295]" in err
    endless = _write(tmp_path, "endless.toml", SUITE.replace("total_steps = 800",
                                                             "total_steps = 9223372036854775807"))
    err = error_of(["run", str(endless), "--out", str(tmp_path / "e")])
    assert "agent[1].total_steps" in err and "max_total_steps" in err
    assert "--job-timeout" in error_of(["run", str(good), "--job-timeout", "0"])
    assert not (tmp_path / "s").exists() and not (tmp_path / "e").exists()


def test_version_and_help(capsys):
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.startswith("needbench ")
    assert main([]) == 0
    printed = capsys.readouterr().out
    assert all(verb in printed for verb in ("list", "describe", "run", "results", "watch",
                                            "report", "compare", "drive"))


def test_list_shows_every_task_agent_and_suite(capsys):
    assert main(["list"]) == 0
    printed = capsys.readouterr().out
    for name in (*needbench.envs.TASK_IDS, *AGENTS, *builtin_suites()):
        assert name in printed


def test_describe_shows_the_needs_of_the_task(capsys):
    assert main(["describe", "Menu"]) == 0
    printed = capsys.readouterr().out
    physiology = gym.make("needbench/Menu-v0").unwrapped.core.physiology
    for need in physiology.needs:
        line = next(line for line in printed.splitlines() if line.strip().startswith(need.name))
        assert f"{need.set_point:g}" in line and f"{need.band:g}" in line and need.unit in line
    assert "time limit: 200 steps" in printed and "max_steps" in printed


def test_describe_lists_everything_and_names_the_actions(capsys):
    assert main(["describe", "ForageWide"]) == 0
    printed = capsys.readouterr().out
    world = gym.make("needbench/ForageWide-v0").unwrapped.core.world
    assert len(world.feature_names) > 100
    # Every feature name in full, none cut off with an ellipsis.
    assert all(name in printed for name in world.feature_names) and "..." not in printed
    assert "0 stay, 1 north, 2 east, 3 south, 4 west" in printed
    assert main(["describe", "Shift"]) == 0
    assert "0 rake salt" in capsys.readouterr().out


def test_watch_shows_one_frame_per_step(capsys):
    assert main(["watch", "Menu", "--agent", "tabular-q", "--steps", "5", "--learn-steps", "400",
                 "--fps", "0"]) == 0
    printed = capsys.readouterr().out
    assert sum(line.startswith("energy") for line in printed.splitlines()) == 6  # reset + 5
    assert "episode of 5 steps, truncated" in printed


def test_watch_says_which_agents_learn_and_shows_action_reward_and_frames(capsys, tmp_path):
    image = pytest.importorskip("matplotlib.image")
    assert main(["watch", "Menu", "--agent", "setpoint-controller", "--steps", "2",
                 "--fps", "0"]) == 0
    printed = capsys.readouterr().out
    assert "does not learn from experience" in printed and "learns for" not in printed
    frames = tmp_path / "frames"
    assert main(["watch", "Menu", "--agent", "tabular-q", "--steps", "2", "--learn-steps", "400",
                 "--fps", "0", "--set", "epsilon_end=0.2", "--set", "exploration=softmax",
                 "--frames", str(frames)]) == 0
    printed = capsys.readouterr().out
    assert "learns for 400 steps" in printed and "learning: 400 / 400 steps (100%)" in printed
    steps = [line for line in printed.splitlines() if line.startswith("step ")]
    assert steps[0] == "step 0: start of the episode" and len(steps) == 3
    assert all(", reward " in line and ": action " in line for line in steps[1:])
    files = sorted(frames.glob("frame-*.png"))
    assert len(files) == 3 and "frames: 3 PNG files" in printed
    for path in files:  # Source: matplotlib's PNG reader decodes what we wrote
        assert min(image.imread(path).shape[:2]) >= 256


def test_watch_settings_are_checked_by_the_agents_dataclass(capsys):
    assert parse_settings(["learning_rate=0.25", "net_arch=[64, 64]", "exploration=softmax",
                           "verbose=true", 'name="a=b"']) == {
        "learning_rate": 0.25, "net_arch": [64, 64], "exploration": "softmax",
        "verbose": True, "name": "a=b"}
    assert main(["watch", "Menu", "--agent", "tabular-q", "--set", "epsilon=0.2"]) == 2
    error = capsys.readouterr().err
    assert "tabular-q.epsilon" in error and "did you mean" in error
    assert main(["watch", "Menu", "--agent", "tabular-q", "--set", "learning_rate=7"]) == 2
    assert "learning_rate" in capsys.readouterr().err
    assert main(["watch", "Menu", "--agent", "tabular-q", "--set", "learning_rate"]) == 2
    assert "KEY=VALUE" in capsys.readouterr().err
    # A pair the agent does not handle is named in plain words, as `run` lists it.
    assert main(["watch", "Arena", "--agent", "tabular-q"]) == 2
    error = capsys.readouterr().err
    assert "an agent that handles needbench/Arena-v0" in error and "Discrete" in error
    assert main(["watch", "Drift", "--agent", "exact-planner"]) == 2
    printed = capsys.readouterr()
    assert "handles needbench/Drift-v0" in printed.err and "acts at once" not in printed.out


KEEP_SUITE = """
[suite]
name = "keep-test"
seeds = [3]
eval_episodes = 2

[[task]]
id = "needbench/Menu-v0"

[[agent]]
name = "tabular-q"
total_steps = 2000
"""


def test_saved_agents_replay_as_they_were_evaluated(tmp_path, capsys):
    suite = _write(tmp_path, "keep.toml", KEEP_SUITE)
    out = tmp_path / "out"
    assert main(["run", str(suite), "--out", str(out), "--workers", "1", "--save-agents"]) == 0
    assert f"trained agents: {out / 'agents'}/" in capsys.readouterr().out
    with Store(out / "results.sqlite3") as store:
        run = store.runs()[0]
        path = store.agent_file(run["hash"])
        first = store.episodes(run["hash"])[0]["metrics"]
    assert path.is_file() and path.parent == out / "agents"
    with (out / "runs.csv").open(newline="") as handle:
        assert next(csv.DictReader(handle))["agent_file"] == f"agents/{path.name}"
    # The file replays the agent that was evaluated: watch's episode (seed 3) is the run's
    # first evaluation episode.
    assert main(["watch", "Menu", "--agent-file", str(path), "--seed", "3", "--fps", "0"]) == 0
    printed = capsys.readouterr().out
    assert "loaded from" in printed and "learns for" not in printed
    assert f"return {first['return']:.3g}," in printed
    assert main(["watch", "Forage", "--agent-file", str(path)]) == 2
    assert "spaces of needbench/Forage-v0" in capsys.readouterr().err
    assert main(["watch", "Menu", "--agent-file", str(path), "--set", "gamma=0.5"]) == 2
    assert "--agent-file" in capsys.readouterr().err
    assert main(["watch", "Menu", "--agent-file", str(suite)]) == 2
    assert "needbench-agent file" in capsys.readouterr().err


def test_builtin_suites_fit_the_registries():
    suites = {name: load_suite(name) for name in builtin_suites()}
    assert {"quickstart", "core", "tradeoff"} <= set(suites)
    registered = set(needbench.envs.TASK_IDS)
    # quickstart and core cover every registered task: a new task must be added to them.
    assert {task.id for task in suites["quickstart"].tasks} == registered
    assert {task.id for task in suites["core"].tasks} == registered
    assert len(suites["core"].seeds) >= 5
    assert {task.id for task in suites["tradeoff"].tasks} == {"needbench/Shift-v0",
                                                              "needbench/Forage-v0"}
    labels = {sweep.label for sweep in suites["tradeoff"].sweeps}
    assert "task.task_weight" in labels and any("gamma" in label for label in labels)


def _cells(runs: int) -> list[Cell]:
    estimate = (1.25, None, None) if runs < 3 else (1.25, 0.5, 2.0)
    return [Cell("s", "needbench/Menu-v0", agent, "{}", runs, 0,
                 {"return": estimate, "discounted_drive": estimate, "time_in_band": estimate,
                  "survival": estimate}) for agent in ("random", "tabular-q")]


def test_results_table_narrows_to_the_terminal_or_stays_wide():
    wide = format_table(_cells(4))
    assert "return IQM [95% CI]" in wide and "1.25 [0.5, 2]" in wide
    assert "left out" not in wide
    narrow = format_table(_cells(4), width=80)
    assert "1.25 [0.5, 2]" not in narrow and "return" in narrow
    assert "95% intervals left out to fit 80 columns; --wide shows them." in " ".join(
        narrow.split())
    assert max(len(line) for line in narrow.splitlines()) <= 80


def test_results_table_shows_no_interval_under_three_runs():
    table = format_table(_cells(2))
    assert "[" not in table.split("\n", 2)[2].split("(")[0]
    assert "fewer than 3 runs show the IQM and no interval" in table
