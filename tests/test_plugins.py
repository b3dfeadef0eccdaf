"""Users' own agents and tasks: installed plug-ins (entry points), ``module:Class`` agents
and ``module:EnvId`` tasks behind ``--allow-import``, and ``--job-timeout`` on Ray.

A plug-in is "installed" the way an installer leaves it: a package folder and a
``<name>-<version>.dist-info`` folder (METADATA, entry_points.txt) in a folder on
``sys.path`` (PYTHONPATH for the command line in a subprocess).
"""

from __future__ import annotations

import importlib.metadata
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from needbench.agents.random_agent import RandomAgent
from needbench.agents.registry import (
    AGENTS,
    PluginWarning,
    agent_class,
    agent_source,
    discover_plugins,
)
from needbench.benchmarks.cli import main
from needbench.benchmarks.runner import RunSettings, run_suite, timeout_text
from needbench.benchmarks.spec import SuiteError, load_suite, parse_suite
from needbench.benchmarks.store import Store
from needbench.envs.errors import ConfigError

PLUGIN_AGENTS = '''
"""Agents of an invented field station that keeps its instruments topped up."""

import dataclasses

import numpy as np

from needbench.agents.base import Agent, batch_size


class SteadyChoice(Agent):
    """Always takes the same action (a floor a learning agent should beat)."""

    name = "steady-choice"
    learns_from_experience = False

    @dataclasses.dataclass(frozen=True)
    class Hyperparameters:
        action: int = 0  # the action taken at every step

    def learn(self, env, total_steps, seed, logger=None):
        return self

    def _act(self, observations, deterministic):
        return np.full(batch_size(observations), self.hyperparameters.action, dtype=np.int64)


class HalfDone(Agent):
    """Learns, but cannot act: it leaves out _act."""

    name = "half-done"

    def learn(self, env, total_steps, seed, logger=None):
        return self
'''

METADATA = """Metadata-Version: 2.1
Name: {name}
Version: {version}
Summary: A needbench plug-in made by the tests.
"""


def install_distribution(site: Path, name: str, version: str, modules: dict[str, str],
                         entry_points: dict[str, str]) -> Path:
    """Write an installed distribution into ``site``: its modules and its dist-info folder.

    # Source: Python Packaging User Guide, "Recording installed projects" (a
    # <name>-<version>.dist-info folder holding METADATA) and "Entry points
    # specification" (entry_points.txt: an INI file, one [group] section,
    # name = module:attribute lines).
    """
    for relative, text in modules.items():
        path = site / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text))
    info = site / f"{name.replace('-', '_')}-{version}.dist-info"
    info.mkdir(parents=True)
    (info / "METADATA").write_text(METADATA.format(name=name, version=version))
    lines = ["[needbench.agents]"] + [f"{key} = {value}" for key, value in entry_points.items()]
    (info / "entry_points.txt").write_text("\n".join(lines) + "\n")
    return site


@pytest.fixture(scope="module")
def plugin_site(tmp_path_factory) -> Path:
    """A folder holding the installed plug-in thirst-lab 0.2.0 (two agents, one broken)."""
    site = tmp_path_factory.mktemp("site")
    return install_distribution(
        site, "thirst-lab", "0.2.0",
        {"thirst_lab/__init__.py": "", "thirst_lab/agents.py": PLUGIN_AGENTS},
        {"steady-choice": "thirst_lab.agents:SteadyChoice",
         "half-done": "thirst_lab.agents:HalfDone"})


@pytest.fixture
def installed(plugin_site, monkeypatch):
    """thirst-lab visible to this process's registry (and to pool workers, which inherit
    sys.path); the registry is put back afterwards."""
    monkeypatch.syspath_prepend(str(plugin_site))
    discover_plugins(refresh=True)
    yield plugin_site
    monkeypatch.undo()
    for module in [name for name in sys.modules if name.startswith("thirst_lab")]:
        sys.modules.pop(module)
    discover_plugins(refresh=True)


def needbench_cli(arguments: list[str], cwd: Path, pythonpath: Path | None = None):
    """The installed ``needbench`` command in a subprocess (a fresh interpreter)."""
    environment = dict(os.environ)
    if pythonpath is not None:
        environment["PYTHONPATH"] = os.pathsep.join(
            [str(pythonpath)] + ([environment["PYTHONPATH"]] if environment.get("PYTHONPATH")
                                 else []))
    command = [sys.executable, "-c", "import sys; from needbench.benchmarks.cli import main; "
               "sys.exit(main())", *arguments]
    return subprocess.run(command, cwd=cwd, env=environment, capture_output=True, text=True,
                          timeout=300)


PLUGIN_SUITE = """
[suite]
name = "plugin-test"
seeds = [0, 1]
eval_episodes = 2

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 15

[[agent]]
name = "steady-choice"
total_steps = 0
[agent.hyperparameters]
action = 2

[[agent]]
name = "random"
total_steps = 0
"""


def test_an_installed_plugin_is_listed_and_runs_in_two_workers(plugin_site, tmp_path):
    # The distribution as Python's own metadata reader sees it.
    # Source: importlib.metadata (standard library) reads dist-info folders on sys.path.
    sys.path.insert(0, str(plugin_site))
    try:
        found = importlib.metadata.distribution("thirst-lab")
        assert found.version == "0.2.0"
        assert {entry.name for entry in found.entry_points} == {"steady-choice", "half-done"}
    finally:
        sys.path.remove(str(plugin_site))

    listing = needbench_cli(["list"], tmp_path, plugin_site)
    assert listing.returncode == 0, listing.stderr
    lines = {line.split()[0]: line for line in listing.stdout.splitlines()
             if line.startswith("  ")}
    assert "[plug-in: thirst-lab 0.2.0]" in lines["steady-choice"]
    assert "Always takes the same action" in lines["steady-choice"]
    assert "not usable" in lines["half-done"] and "_act" in lines["half-done"]
    assert "plug-in" not in lines["random"]

    (tmp_path / "suite.toml").write_text(PLUGIN_SUITE)
    run = needbench_cli(["run", "suite.toml", "--out", "out", "--workers", "2", "--quiet"],
                        tmp_path, plugin_site)
    assert run.returncode == 0, run.stderr
    assert "steady-choice" in run.stdout  # the results table
    with Store(tmp_path / "out" / "results.sqlite3") as store:
        runs = store.runs(status="done")
        assert sorted((r["agent"], r["seed"]) for r in runs) == [
            ("random", 0), ("random", 1), ("steady-choice", 0), ("steady-choice", 1)]
        for record in runs:
            environment = record["environment"]
            if record["agent"] == "steady-choice":
                assert environment["agent_package"] == "thirst-lab"
                assert environment["thirst-lab"] == "0.2.0"
                # The plug-in's own act ran in the workers: every action is 2.
                trace = store.trace(record["hash"], 0)
                assert trace["action"].size >= 1 and np.all(trace["action"] == 2)
            else:
                assert "agent_package" not in environment
        assert len(store.episodes(suite="plugin-test")) == 8
    # Without the plug-in on the path, the suite's agent is unknown: a clear exit 2.
    missing = needbench_cli(["run", "suite.toml", "--out", "other"], tmp_path)
    assert missing.returncode == 2 and "Traceback" not in missing.stderr
    assert "agent[0].name = 'steady-choice'" in missing.stderr


def test_a_plugin_runs_through_the_python_api_watch_and_compare(installed, tmp_path, capsys):
    assert agent_source("steady-choice").label == "thirst-lab 0.2.0"
    suite = load_suite(PLUGIN_SUITE.replace("seeds = [0, 1]", "seeds = [0, 1, 2]"))
    with Store(tmp_path / "results.sqlite3") as store:
        summary = run_suite(suite, store, workers=2)
    assert summary.ok and len(summary.done) == 6
    assert main(["compare", str(tmp_path), "--agents", "steady-choice", "random",
                 "--out", str(tmp_path / "cmp")]) == 0
    comparison = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    assert "steady-choice" in json.dumps(comparison)
    capsys.readouterr()
    assert main(["watch", "Menu", "--agent", "steady-choice", "--set", "action=1",
                 "--steps", "3", "--fps", "0"]) == 0
    printed = capsys.readouterr().out
    assert "step 3: action 1" in printed


CLASHING = '''
from needbench.agents.random_agent import RandomAgent


class NotReallyRandom(RandomAgent):
    """Would take the built-in name."""
'''


def test_a_clash_and_a_class_off_the_protocol_are_clear_errors(installed, tmp_path,
                                                                monkeypatch):
    site = install_distribution(tmp_path / "clash", "clashing-lab", "1.0",
                                {"clashing_lab.py": CLASHING},
                                {"random": "clashing_lab:NotReallyRandom"})
    monkeypatch.syspath_prepend(str(site))
    with pytest.warns(PluginWarning, match=r"'random' of package clashing-lab 1\.0 is left out"):
        discover_plugins(refresh=True)
    assert AGENTS["random"] is RandomAgent  # the built-in stays
    with pytest.raises(ConfigError, match=r"thirst-lab 0\.2\.0.*does not implement _act"):
        agent_class("half-done")
    with pytest.raises(SuiteError, match=r"agent\[0\]\.name.*thirst-lab 0\.2\.0"):
        load_suite(PLUGIN_SUITE.replace('"steady-choice"', '"half-done"')
                   .replace("[agent.hyperparameters]\naction = 2\n", ""))
    # At the command line: one warning line, no traceback (a quick command that reads the
    # registry: an unknown agent, exit 2).
    shown = needbench_cli(["watch", "Menu", "--agent", "nobody"], tmp_path,
                          Path(os.pathsep.join([str(site), str(installed)])))
    assert shown.returncode == 2 and "Traceback" not in shown.stderr
    assert "needbench: warning: the plug-in agent 'random' of package clashing-lab 1.0 is " \
        "left out" in shown.stderr
    assert "'steady-choice'" in shown.stderr  # among the agents it could have meant


USER_TASK = '''
"""A hut's pantry where the salt of the brine matters too: Menu with a third need."""

import pathlib

import gymnasium

from needbench.envs import Need
from needbench.envs.tasks.menu import MenuEnv, MenuVectorEnv

pathlib.Path(__file__).with_name("imported-tasks").touch()  # did this module run?

SALT = Need("salt", unit="mmol/L", set_point=140.0, band=5.0, lethal_low=115.0,
            lethal_high=165.0, initial_low=138.0, initial_high=142.0, drain=0.2)

if "mylab/BrineMenu-v0" not in gymnasium.registry:
    gymnasium.register("mylab/BrineMenu-v0", entry_point=MenuEnv,
                       vector_entry_point=MenuVectorEnv,
                       kwargs={"extra_needs": (SALT,), "max_steps": 12})
'''

TASK_SUITE = """
[suite]
name = "user-task"
seeds = [0, 1]
eval_episodes = 2

[[task]]
id = "mylab_tasks:mylab/BrineMenu-v0"

[[agent]]
name = "random"
total_steps = 0
"""


@pytest.fixture
def user_folder(tmp_path, monkeypatch):
    """The current folder holds the user's modules; they are forgotten afterwards."""
    (tmp_path / "mylab_tasks.py").write_text(textwrap.dedent(USER_TASK))
    (tmp_path / "mylab_agents.py").write_text(textwrap.dedent(USER_AGENTS))
    monkeypatch.chdir(tmp_path)
    saved = list(sys.path)
    yield tmp_path
    sys.path[:] = saved
    for module in ("mylab_tasks", "mylab_agents"):
        sys.modules.pop(module, None)


def test_a_user_task_by_module_id_runs_only_with_allow_import(user_folder, capsys):
    (user_folder / "suite.toml").write_text(TASK_SUITE)
    assert main(["run", "suite.toml", "--out", "refused"]) == 2
    err = capsys.readouterr().err
    assert "task[0].id = 'mylab_tasks:mylab/BrineMenu-v0'" in err
    assert "would import the module 'mylab_tasks' and run its code" in err
    assert "--allow-import" in err and "Traceback" not in err
    assert not (user_folder / "imported-tasks").exists()  # nothing of it ran
    assert not (user_folder / "refused").exists()
    with pytest.raises(SuiteError, match="allow_import=True"):
        parse_suite(TASK_SUITE, known_tasks=(), known_agents=list(AGENTS))

    assert main(["run", "suite.toml", "--out", "out", "--workers", "2", "--allow-import",
                 "--quiet"]) == 0
    assert (user_folder / "imported-tasks").exists()
    with Store(user_folder / "out" / "results.sqlite3") as store:
        runs = store.runs(status="done")
        assert len(runs) == 2
        assert runs[0]["environment"]["task_module"] == str(user_folder / "mylab_tasks.py")
        trace = store.trace(runs[0]["hash"], 0)
        assert trace["level"].shape[1] == 3  # energy, water and the user's salt
        assert trace["drive"].shape[0] - 1 <= 12
    # watch and describe take the same id, under the same flag.
    assert main(["describe", "mylab_tasks:mylab/BrineMenu-v0"]) == 2
    assert "--allow-import" in capsys.readouterr().err
    assert main(["describe", "mylab_tasks:mylab/BrineMenu-v0", "--allow-import"]) == 0
    assert "salt" in capsys.readouterr().out


USER_AGENTS = '''
"""A field station's own agents, kept in a local file."""

import pathlib
import time

import numpy as np

from needbench.agents.base import Agent, batch_size

pathlib.Path(__file__).with_name("imported-agents").touch()  # did this module run?


class FirstChoice(Agent):
    """Takes the action `choice`; its own __init__, no hyperparameter dataclass."""

    name = "first-choice"
    learns_from_experience = False

    def __init__(self, observation_space, action_space, choice=0):
        super().__init__(observation_space, action_space)
        if not 0 <= choice < action_space.n:
            raise ValueError(f"choice {choice} is not an action of {action_space}")
        self.choice = choice

    def learn(self, env, total_steps, seed, logger=None):
        if seed == 1 and self.choice == 3:
            time.sleep(3600)  # hangs: for the job timeout
        return self

    def _act(self, observations, deterministic):
        return np.full(batch_size(observations), self.choice, dtype=np.int64)
'''

AGENT_SUITE = """
[suite]
name = "user-agent"
seeds = [0, 1]
eval_episodes = 2

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 10

[[agent]]
name = "mylab_agents:FirstChoice"
total_steps = 0
[agent.hyperparameters]
choice = 1
"""


def test_a_local_agent_class_runs_only_with_allow_import(user_folder, capsys):
    (user_folder / "suite.toml").write_text(AGENT_SUITE)
    assert main(["run", "suite.toml", "--out", "refused"]) == 2
    err = capsys.readouterr().err
    assert "agent[0].name = 'mylab_agents:FirstChoice'" in err
    assert "would import the module 'mylab_agents' and run its code" in err
    assert not (user_folder / "imported-agents").exists()
    assert main(["watch", "Menu", "--agent", "mylab_agents:FirstChoice"]) == 2
    assert "--allow-import" in capsys.readouterr().err
    assert not (user_folder / "imported-agents").exists()

    # Without a hyperparameter dataclass, hyperparameters are checked by building the agent.
    (user_folder / "bad.toml").write_text(AGENT_SUITE.replace("choice = 1", "choice = 9"))
    assert main(["run", "bad.toml", "--out", "bad", "--allow-import"]) == 2
    err = capsys.readouterr().err
    assert "agent[0].hyperparameters" in err and "choice 9 is not an action" in err
    assert "Traceback" not in err and not (user_folder / "bad").exists()
    (user_folder / "typo.toml").write_text(AGENT_SUITE.replace("choice = 1", "choise = 1"))
    assert main(["run", "typo.toml", "--out", "typo", "--allow-import"]) == 2
    assert "choise" in capsys.readouterr().err
    (user_folder / "gone.toml").write_text(AGENT_SUITE.replace("FirstChoice", "LastChoice"))
    assert main(["run", "gone.toml", "--out", "gone", "--allow-import"]) == 2
    assert "'LastChoice' is not there" in capsys.readouterr().err

    assert main(["run", "suite.toml", "--out", "out", "--workers", "2", "--allow-import",
                 "--quiet"]) == 0
    with Store(user_folder / "out" / "results.sqlite3") as store:
        runs = store.runs(status="done")
        assert {run["agent"] for run in runs} == {"mylab_agents:FirstChoice"}
        assert len(runs) == 2
        assert runs[0]["environment"]["agent_module"] == str(user_folder / "mylab_agents.py")
        assert np.all(store.trace(runs[0]["hash"], 0)["action"] == 1)
    assert main(["watch", "Menu", "--agent", "mylab_agents:FirstChoice", "--set", "choice=2",
                 "--steps", "2", "--fps", "0", "--allow-import"]) == 0
    assert "step 2: action 2" in capsys.readouterr().out


def test_the_python_api_takes_allow_import(user_folder, tmp_path):
    with pytest.raises(SuiteError, match="allow_import=True"):
        load_suite(AGENT_SUITE)
    sys.path.append(str(user_folder))
    suite = load_suite(AGENT_SUITE, allow_import=True)
    with Store(tmp_path / "api.sqlite3") as store, \
            pytest.raises(ConfigError, match="would import the module 'mylab_agents'"):
        run_suite(suite, store, workers=1)
    with Store(tmp_path / "api.sqlite3") as store:
        assert run_suite(suite, store, workers=1, allow_import=True).ok


#: Seconds a Ray job may run here: a healthy job of this suite takes well under a second
#: once its worker has loaded needbench, and a few seconds on a busy machine before.
TIMEOUT = 15.0


@pytest.mark.ray
def test_on_ray_plugins_imports_and_the_job_timeout_reach_the_workers(
        installed, user_folder, ray_session, tmp_path):
    # A plug-in found through sys.path only, a local class, and a job that hangs (seed 1 with
    # choice 3): the workers get the folders to import from, and the hung job is stopped.
    suite_text = PLUGIN_SUITE.replace('name = "random"\ntotal_steps = 0\n',
                                      'name = "mylab_agents:FirstChoice"\ntotal_steps = 0\n'
                                      '[agent.hyperparameters]\nchoice = 3\n')
    sys.path.append(str(user_folder))
    suite = load_suite(suite_text, allow_import=True)
    started = time.monotonic()
    with Store(tmp_path / "ray.sqlite3") as store:
        summary = run_suite(suite, store, backend="ray", job_timeout=TIMEOUT, allow_import=True,
                            settings=RunSettings(tensorboard_root=None))
        status = {(run["agent"], run["seed"]): run["status"] for run in store.runs()}
        failed = store.runs(status="failed")
    errors = [(run["agent"], run["seed"], run["error"][-600:]) for run in failed]
    assert status == {("steady-choice", 0): "done", ("steady-choice", 1): "done",
                      ("mylab_agents:FirstChoice", 0): "done",
                      ("mylab_agents:FirstChoice", 1): "failed"}, errors
    assert failed[0]["error"] == timeout_text(TIMEOUT)
    assert len(summary.failed) == 1
    assert time.monotonic() - started < 120  # the hung job would sleep an hour
