"""Suite files: parsing, every kind of error, job expansion and job hashes."""

from __future__ import annotations

import copy
import hashlib
import json
import os
import pickle
import subprocess
import sys

import pytest

from needbench.benchmarks import spec
from needbench.envs.errors import ConfigError

FULL = """
[suite]
name = "cold-snap"
description = "Two climates, three agents"
seeds = [0, 1, 2, 3]
eval_episodes = 5
gamma = 0.95

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
task_weight = 0.0
pantry = { shelves = 3, items = ["soup", "tea"], "odd key" = true }

[[task]]
id = "needbench/Forewarn-v0"

[[agent]]
name = "random"
total_steps = 0

[[agent]]
name = "tabular-q"
total_steps = 20000
[agent.hyperparameters]
learning_rate = 0.1
epsilon = 0.05

[[agent]]
name = "setpoint-controller"
total_steps = 0

[[sweep]]
target = "task"
parameter = "task_weight"
values = [0.0, 0.5, 1.0]
match = "needbench/Menu-v0"

[[sweep]]
target = "agent"
parameter = "learning_rate"
values = [0.05, 0.2]
match = "tabular-q"
"""

BASE = """
[suite]
name = "small"
seeds = [0]

[[task]]
id = "needbench/Menu-v0"

[[agent]]
name = "random"
total_steps = 10
"""


def test_valid_file(tmp_path):
    path = tmp_path / "cold-snap.toml"
    path.write_text(FULL)
    suite = spec.parse_suite(path)
    assert suite.source == str(path)
    assert (suite.name, suite.description) == ("cold-snap", "Two climates, three agents")
    assert suite.seeds == (0, 1, 2, 3)
    assert (suite.eval_episodes, suite.gamma) == (5, 0.95)
    assert [task.id for task in suite.tasks] == ["needbench/Menu-v0", "needbench/Forewarn-v0"]
    assert suite.tasks[0].kwargs == {"task_weight": 0.0,
                                     "pantry": {"shelves": 3, "items": ["soup", "tea"],
                                                "odd key": True}}
    assert suite.tasks[1].kwargs == {}
    assert suite.agents[1] == spec.AgentSpec("tabular-q", 20000,
                                             {"learning_rate": 0.1, "epsilon": 0.05})
    assert suite.sweeps[1] == spec.Sweep("agent", "learning_rate", (0.05, 0.2), "tabular-q")
    # The same text given directly, as a path string, and written back out by to_toml.
    assert spec.parse_suite(FULL) == suite
    assert spec.parse_suite(str(path)) == suite
    assert spec.parse_suite(spec.to_toml(suite)) == suite


def test_defaults():
    suite = spec.parse_suite(BASE)
    assert suite.description == "" and suite.sweeps == ()
    assert (suite.eval_episodes, suite.gamma) == (spec.DEFAULT_EVAL_EPISODES,
                                                 spec.DEFAULT_GAMMA)


def _replace(old: str, new: str, text: str = BASE) -> str:
    assert old in text
    return text.replace(old, new)


SWEEP = '\n[[sweep]]\ntarget = "task"\nparameter = "task_weight"\nvalues = [0.0, 1.0]\n'
SWEPT_BUDGET = """
[[sweep]]
target = "agent"
parameter = "total_steps"
values = [10, 2000000000]
"""

SECOND_AGENT = '\n[[agent]]\nname = "tabular-q"\ntotal_steps = -5\n'

# (case, suite text, parse_suite keywords, key path, value as shown, allowed, suggestion)
ERRORS = [
    ("unknown top-level key", BASE + '\n[[agnet]]\nname = "x"\n', {}, "agnet",
     "[{'name': 'x'}]", "one of the keys", "agent"),
    ("unknown suite key", _replace("seeds = [0]", "seeds = [0]\neval_episode = 3"), {},
     "suite.eval_episode", "3", "one of the keys", "eval_episodes"),
    ("unknown agent key", _replace("total_steps = 10", "total_steps = 10\ntotl_steps = 5"), {},
     "agent[0].totl_steps", "5", "one of the keys", "total_steps"),
    ("missing name", _replace('name = "small"\n', ""), {}, "suite.name", "<missing>",
     "a non-empty string (required)", None),
    ("missing seeds", _replace("seeds = [0]\n", ""), {}, "suite.seeds", "<missing>",
     "distinct integers >= 0", None),
    ("seed of the wrong type", _replace("seeds = [0]", 'seeds = [0, "one"]'), {},
     "suite.seeds[1]", "'one'", "an integer in [0, 4294967295]", None),
    ("repeated seed", _replace("seeds = [0]", "seeds = [0, 0]"), {}, "suite.seeds[1]", "0",
     "not already listed", None),
    ("gamma out of range", _replace("seeds = [0]", "seeds = [0]\ngamma = 1.0"), {},
     "suite.gamma", "1.0", "(0, 1)", None),
    ("no evaluation episodes", _replace("seeds = [0]", "seeds = [0]\neval_episodes = 0"), {},
     "suite.eval_episodes", "0", "an integer >= 1", None),
    ("boolean for an integer", _replace("seeds = [0]", "seeds = [0]\neval_episodes = true"),
     {}, "suite.eval_episodes", "True", "an integer >= 1", None),
    ("negative budget", BASE + SECOND_AGENT, {}, "agent[1].total_steps", "-5",
     "an integer in [0, 1000000000]", None),
    ("fractional budget", _replace("total_steps = 10", "total_steps = 1.5"), {},
     "agent[0].total_steps", "1.5", "an integer in [0, 1000000000]", None),
    # Issue 11, item 3: a seed SQLite's INTEGER cannot hold was accepted, then crashed the store.
    ("seed of 2**63", _replace("seeds = [0]", "seeds = [9223372036854775808]"), {},
     "suite.seeds[0]", "9223372036854775808", "an integer in [0, 4294967295]", None),
    ("seed above numpy's legacy range", _replace("seeds = [0]", "seeds = [4294967296]"), {},
     "suite.seeds[0]", "4294967296", "an integer in [0, 4294967295]", None),
    # Issue 11, item 11: a budget of 2**63 steps would run until killed.
    ("budget of 2**63", _replace("total_steps = 10", "total_steps = 9223372036854775807"), {},
     "agent[0].total_steps", "9223372036854775807", "raise [suite] max_total_steps", None),
    ("budget above a lowered bound", _replace("seeds = [0]", "seeds = [0]\nmax_total_steps = 5"),
     {}, "agent[0].total_steps", "10", "an integer in [0, 5]", None),
    ("bound on budgets of zero", _replace("seeds = [0]", "seeds = [0]\nmax_total_steps = 0"),
     {}, "suite.max_total_steps", "0", "an integer >= 1", None),
    ("swept budget above the bound", BASE + SWEPT_BUDGET, {}, "sweep[0].values[1]",
     "2000000000", "max_total_steps", None),
    ("no task", _replace('[[task]]\nid = "needbench/Menu-v0"\n', ""), {}, "task", "<missing>",
     "at least one [[task]]", None),
    ("task as a single table", _replace("[[task]]", "[task]"), {}, "task",
     "{'id': 'needbench/Menu-v0'}", "write each as [[task]]", None),
    ("kwargs not a table", _replace('id = "needbench/Menu-v0"',
                                    'id = "needbench/Menu-v0"\nkwargs = 3'), {},
     "task[0].kwargs", "3", "a table", None),
    ("date in kwargs", _replace('id = "needbench/Menu-v0"',
                                'id = "needbench/Menu-v0"\nkwargs = { when = 2024-05-01 }'),
     {}, "task[0].kwargs.when", "datetime.date(2024, 5, 1)", "dates and times", None),
    ("repeated task", _replace("[[agent]]", '[[task]]\nid = "needbench/Menu-v0"\n\n[[agent]]'),
     {}, "task[1].id", "'needbench/Menu-v0'", "not already listed", None),
    ("sweep target misspelt", BASE + _replace('target = "task"', 'target = "agnet"', SWEEP),
     {}, "sweep[0].target", "'agnet'", "'task', 'agent', 'gamma'", "agent"),
    ("sweep without values", BASE + _replace("[0.0, 1.0]", "[]", SWEEP), {},
     "sweep[0].values", "[]", "a non-empty array", None),
    ("sweep of an impossible gamma",
     BASE + '\n[[sweep]]\ntarget = "gamma"\nvalues = [0.9, 1.5]\n', {},
     "sweep[0].values[1]", "1.5", "(0, 1)", None),
    ("sweep value repeated", BASE + _replace("[0.0, 1.0]", "[1.0, 1.0]", SWEEP), {},
     "sweep[0].values[1]", "1.0", "not already listed", None),
    ("sweep match misspelt", BASE + SWEEP + 'match = "needbench/Mneu-v0"\n', {},
     "sweep[0].match", "'needbench/Mneu-v0'", "a task id of this suite", "needbench/Menu-v0"),
    ("sweeps setting one parameter twice", BASE + SWEEP + SWEEP, {}, "sweep[1]",
     "'task.task_weight'", "sweep[0] already does", None),
    ("unknown task id", BASE, {"known_tasks": {"needbench/Menus-v0", "needbench/Thermal-v0"}},
     "task[0].id", "'needbench/Menu-v0'", "a registered task id", "needbench/Menus-v0"),
    ("unknown agent name", _replace('name = "random"', 'name = "tabular_q"'),
     {"known_agents": {"random", "tabular-q", "ppo"}}, "agent[0].name", "'tabular_q'",
     "a registered agent name", "tabular-q"),
    ("TOML syntax", _replace("seeds = [0]", "seeds = [0"), {}, "toml syntax", "line",
     "valid TOML", None),
]


@pytest.mark.parametrize("case, text, keywords, path, value, allowed, suggestion", ERRORS,
                         ids=[case[0] for case in ERRORS])
def test_errors_name_file_path_value_allowed_and_suggestion(
        tmp_path, case, text, keywords, path, value, allowed, suggestion):
    file = tmp_path / "broken.toml"
    file.write_text(text)
    with pytest.raises(spec.SuiteError) as caught:
        spec.parse_suite(file, **keywords)
    error = caught.value
    message = str(error)
    assert isinstance(error, ConfigError) and isinstance(error, ValueError)
    assert error.source == str(file) and message.startswith(f"{file}: ")
    assert error.path == path and path in message
    assert value in message
    assert allowed in message
    assert error.suggestion == suggestion
    if suggestion is not None:
        assert f"did you mean {suggestion!r}?" in message


def test_missing_file(tmp_path):
    with pytest.raises(spec.SuiteError, match="an existing suite file"):
        spec.parse_suite(tmp_path / "absent.toml")


# ----------------------------------------------------------------------------
# Jobs
# ----------------------------------------------------------------------------

def test_grid_size_and_order():
    jobs = spec.expand(spec.parse_suite(FULL))
    # Source: hand count. Menu-v0 takes the task_weight sweep (3 values) with
    # every agent, tabular-q also the learning_rate sweep (2 values); Forewarn-v0
    # only the latter. With 4 seeds:
    #   Menu-v0:     random 4*3 + tabular-q 4*3*2 + setpoint 4*3 = 12 + 24 + 12 = 48
    #   Forewarn-v0: random 4   + tabular-q 4*2   + setpoint 4   =  4 +  8 +  4 = 16
    assert len(jobs) == 64
    assert len({job.hash for job in jobs}) == 64
    # Order: tasks x agents x seeds x grid.
    assert [(job.task_id, job.agent_name, job.seed) for job in jobs[:4]] == [
        ("needbench/Menu-v0", "random", 0)] * 3 + [("needbench/Menu-v0", "random", 1)]
    assert [job.config["task"]["kwargs"]["task_weight"] for job in jobs[:3]] == [0.0, 0.5, 1.0]
    tabular = [job for job in jobs if job.agent_name == "tabular-q"]
    assert {job.config["agent"]["hyperparameters"]["learning_rate"] for job in tabular} == {
        0.05, 0.2}
    assert tabular[0].config["agent"]["hyperparameters"]["epsilon"] == 0.05
    assert tabular[0].config["sweep"] == {"task.task_weight": 0.0,
                                          "agent.learning_rate": 0.05}
    # The suite's own settings are untouched by the sweep values written into jobs.
    assert spec.parse_suite(FULL).tasks[0].kwargs["task_weight"] == 0.0


def test_gamma_and_budget_sweeps():
    text = BASE + ('\n[[sweep]]\ntarget = "gamma"\nvalues = [0.9, 0.99]\n'
                   '\n[[sweep]]\ntarget = "agent"\nparameter = "total_steps"\n'
                   'values = [100, 1000]\n')
    jobs = spec.expand(spec.parse_suite(text))
    assert sorted((job.config["gamma"], job.config["agent"]["total_steps"]) for job in jobs) == [
        (0.9, 100), (0.9, 1000), (0.99, 100), (0.99, 1000)]
    assert "hyperparameters" in jobs[0].config["agent"]
    assert jobs[0].config["agent"]["hyperparameters"] == {}


def test_describe():
    job = spec.expand(spec.parse_suite(FULL))[1]
    assert job.describe() == "needbench/Menu-v0 random seed=0 task.task_weight=0.5"


def test_hash_is_sha256_of_canonical_json():
    (job,) = spec.expand(spec.parse_suite(BASE))
    text = ('{"agent":{"hyperparameters":{},"name":"random","total_steps":10},'
            '"eval_episodes":10,"gamma":0.99,"seed":0,"suite":"small","sweep":{},'
            '"task":{"id":"needbench/Menu-v0","kwargs":{}}}')
    # Source: hashlib.sha256 (FIPS 180-4) of the canonical JSON written out by hand
    # (sorted keys, no spaces).
    assert job.hash == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert json.loads(text) == job.config


def test_hash_is_stable_across_processes():
    hashes = [job.hash for job in spec.expand(spec.parse_suite(FULL))]
    program = ("import sys; from needbench.benchmarks import spec; "
               "print(' '.join(j.hash for j in spec.expand(spec.parse_suite(sys.stdin.read()))))")
    output = subprocess.run([sys.executable, "-c", program], input=FULL, capture_output=True,
                            text=True, check=True, env={**os.environ, "PYTHONHASHSEED": "12345"})
    assert output.stdout.split() == hashes


def _leaf_paths(value, prefix=()):
    if isinstance(value, dict):
        if not value:
            yield prefix
        for key, item in value.items():
            yield from _leaf_paths(item, (*prefix, key))
    else:
        yield prefix


def _changed(value):
    if isinstance(value, bool):
        return not value
    if isinstance(value, (int, float)):
        return value + 1
    if isinstance(value, str):
        return value + "x"
    if isinstance(value, list):
        return [*value, 0]
    return {"added": 1}  # an empty table


def test_hash_changes_with_every_field():
    job = spec.expand(spec.parse_suite(FULL))[30]  # a tabular-q job with both sweeps
    paths = list(_leaf_paths(job.config))
    assert len(paths) >= 12
    for path in paths:
        config = copy.deepcopy(job.config)
        parent = config
        for key in path[:-1]:
            parent = parent[key]
        parent[path[-1]] = _changed(parent[path[-1]])
        assert spec.Job(config).hash != job.hash, path


def test_hash_ignores_key_order():
    job = spec.expand(spec.parse_suite(FULL))[30]

    def reverse(value):
        if isinstance(value, dict):
            return {key: reverse(value[key]) for key in reversed(list(value))}
        return value

    assert list(reverse(job.config)) != list(job.config)
    assert spec.Job(reverse(job.config)).hash == job.hash
    # Keys written in another order in the file give the same jobs.
    shuffled = _replace('name = "small"\nseeds = [0]', 'seeds = [0]\nname = "small"')
    shuffled = _replace('name = "random"\ntotal_steps = 10', 'total_steps = 10\nname = "random"',
                        shuffled)
    assert [j.hash for j in spec.expand(spec.parse_suite(shuffled))] == [
        j.hash for j in spec.expand(spec.parse_suite(BASE))]


def test_description_is_not_part_of_a_job():
    described = _replace('name = "small"', 'name = "small"\ndescription = "notes"')
    assert [j.hash for j in spec.expand(spec.parse_suite(described))] == [
        j.hash for j in spec.expand(spec.parse_suite(BASE))]


def test_jobs_pickle_for_worker_processes():
    job = spec.expand(spec.parse_suite(FULL))[5]
    copy_of_job = pickle.loads(pickle.dumps(job))
    assert copy_of_job == job and copy_of_job.hash == job.hash
    assert len({job, copy_of_job}) == 1


# --- a suite checked whole at load ---------------------------------------------------------------

CHECKED = """
[suite]
name = "checked"
seeds = [0]

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 40

[[agent]]
name = "tabular-q"
total_steps = 100
[agent.hyperparameters]
learning_rate = 0.2
"""


def _checked(text: str):
    return spec.load_suite(text)


def test_a_clean_suite_and_the_builtin_suites_pass_the_whole_check():
    assert _checked(CHECKED).name == "checked"
    for name in ("quickstart", "core", "tradeoff"):
        path = spec.Path(spec.__file__).parent / "suites" / f"{name}.toml"
        assert spec.load_suite(path).name == name


@pytest.mark.parametrize("old, new, path, hint", [
    # an unknown task keyword, with the nearest one suggested
    ("max_steps = 40", "max_step = 40", "task[0].kwargs.max_step", "max_steps"),
    # a wrongly typed keyword
    ("max_steps = 40", 'max_steps = "40"', "task[0].kwargs.max_steps", "whole number"),
    # a bad drive name and bad drive parameters
    ("max_steps = 40", 'drive = "homeostatik"', "task[0].kwargs.drive", "homeostatic"),
    ("max_steps = 40", "drive_params = { m = -1.0 }", "task[0].kwargs.drive_params.m", None),
    ("max_steps = 40", "drive_params = { exponent = 2.0 }", "task[0].kwargs.drive_params",
     "n, m, weights"),
    # an unknown or wrongly typed hyperparameter
    ("learning_rate = 0.2", "learnin_rate = 0.2", "agent[0].hyperparameters.learnin_rate",
     "learning_rate"),
    ("learning_rate = 0.2", 'learning_rate = "fast"', "agent[0].hyperparameters.learning_rate",
     "a number in"),
    # a table too large for the task's spaces
    ("learning_rate = 0.2", "internal_bins = 100000", "agent[0].hyperparameters", "state count"),
])
def test_each_kind_of_typo_is_named_at_load(old, new, path, hint):
    assert old in CHECKED
    with pytest.raises(spec.SuiteError) as caught:
        _checked(CHECKED.replace(old, new))
    error = caught.value
    assert error.source == "<string>" and error.path.startswith(path), error
    message = str(error)
    assert message.startswith("<string>: ") and "is not allowed; expected" in message
    if hint is not None:
        assert hint in message


SWEEP = """
[[sweep]]
target = "{target}"
parameter = "{parameter}"
values = {values}
"""


@pytest.mark.parametrize("target, parameter, values, path, hint", [
    ("task", "task_weigth", "[0.0, 0.5]", "sweep[0].parameter", "task_weight"),
    ("task", "task_weight", '[0.0, "half"]', "sweep[0].values[1]", "task_weight"),
    ("task", "max_steps", "[10, 0]", "sweep[0].values[1]", "max_steps"),
    ("agent", "learnin_rate", "[0.1]", "sweep[0].parameter", "learning_rate"),
    ("agent", "learning_rate", "[0.1, 2.0]", "sweep[0].values[1]", "learning_rate"),
    ("agent", "internal_bins", "[4, 100000]", "agent[0].hyperparameters", "internal_bins=100000"),
])
def test_sweep_parameters_and_every_sweep_value_are_checked(target, parameter, values, path,
                                                            hint):
    text = CHECKED + SWEEP.format(target=target, parameter=parameter, values=values)
    with pytest.raises(spec.SuiteError) as caught:
        _checked(text)
    assert caught.value.path.startswith(path), caught.value
    assert hint in str(caught.value)


def test_declared_needs_become_need_objects_and_their_typos_are_named():
    from needbench.envs import Need

    salt = """
[[task.kwargs.extra_needs]]
name = "salt"
unit = "mmol/L"
set_point = 140.0
band = 5.0
lethal_low = 115.0
lethal_high = 165.0
initial_low = 138.0
initial_high = 142.0
drain = 0.2
"""
    suite = _checked(CHECKED + salt)
    (job,) = spec.expand(suite)
    (need,) = job.task_arguments["extra_needs"]
    assert isinstance(need, Need) and need.name == "salt" and need.drain == 0.2
    assert job.task_kwargs["extra_needs"][0]["name"] == "salt"  # the hash sees plain values
    import gymnasium as gym

    env = gym.make(job.task_id, **job.task_arguments)
    assert "salt" in env.unwrapped.core.need_names
    env.close()
    with pytest.raises(spec.SuiteError) as caught:
        _checked(CHECKED + salt.replace("set_point", "setpoint"))
    assert caught.value.path == "task[0].kwargs.extra_needs[0].setpoint"
    assert "set_point" in str(caught.value)
    with pytest.raises(spec.SuiteError) as caught:
        _checked(CHECKED + salt.replace("band = 5.0", "band = -5.0"))
    assert caught.value.path.startswith("task[0].kwargs")
    assert "band" in str(caught.value)


def test_the_cli_exits_2_naming_the_file_before_making_a_folder(tmp_path, capsys):
    from needbench.benchmarks.cli import main

    path = tmp_path / "typo.toml"
    path.write_text(CHECKED.replace("max_steps = 40", "max_step = 40"))
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert f"{path}: task[0].kwargs.max_step = 40" in err and "max_steps" in err
    assert not (tmp_path / "out").exists()


def test_max_total_steps_lets_a_suite_ask_for_more():
    text = BASE.replace("total_steps = 10", "total_steps = 3000000000")
    with pytest.raises(ConfigError, match="max_total_steps"):
        spec.parse_suite(text)
    suite = spec.parse_suite(text.replace("seeds = [0]",
                                          "seeds = [0]\nmax_total_steps = 4000000000"))
    assert suite.max_total_steps == 4_000_000_000 and suite.agents[0].total_steps == 3_000_000_000
    assert spec.parse_suite(spec.to_toml(suite)) == suite
    # The bound is not part of any job: raising it keeps every hash.
    lowered = spec.parse_suite(BASE.replace("seeds = [0]", "seeds = [0]\nmax_total_steps = 10"))
    assert [job.hash for job in spec.expand(lowered)] == \
        [job.hash for job in spec.expand(spec.parse_suite(BASE))]


# --- a task's own settings of an agent -----------------------------------------------------------

PER_TASK = CHECKED + """
[[task]]
id = "needbench/Gamble-v0"
[task.agents.tabular-q]
total_steps = 300
[task.agents.tabular-q.hyperparameters]
world_bins = 2
"""


def test_a_tasks_own_agent_settings_reach_only_its_jobs():
    suite = _checked(PER_TASK)
    menu, gamble = spec.expand(suite)
    assert menu.total_steps == 100 and menu.agent_hyperparameters == {"learning_rate": 0.2}
    # The task's budget replaces the agent's; its hyperparameters are written over the agent's.
    assert gamble.total_steps == 300
    assert gamble.agent_hyperparameters == {"learning_rate": 0.2, "world_bins": 2}
    assert spec.parse_suite(spec.to_toml(suite)) == suite
    # Without the task's settings the Gamble job is another job (another hash).
    plain = _checked(CHECKED + '\n[[task]]\nid = "needbench/Gamble-v0"\n')
    assert spec.expand(plain)[0].hash == menu.hash and spec.expand(plain)[1].hash != gamble.hash


@pytest.mark.parametrize("old, new, path, hint", [
    ("[task.agents.tabular-q]\n", "[task.agents.tabular]\n", "task[1].agents.tabular",
     "tabular-q"),
    ("total_steps = 300", "total_step = 300", "task[1].agents.tabular-q.total_step",
     "total_steps"),
    ("total_steps = 300", "total_steps = -1", "task[1].agents.tabular-q.total_steps",
     "max_total_steps"),
    ("world_bins = 2", "world_bin = 2", "task[1].agents.tabular-q.hyperparameters.world_bin",
     "world_bins"),
    ("world_bins = 2", "world_bins = 0", "task[1].agents.tabular-q.hyperparameters.world_bins",
     "whole number"),
])
def test_a_tasks_agent_settings_are_checked_like_the_agents_own(old, new, path, hint):
    text = PER_TASK.replace(old, new)
    if old.startswith("[task.agents.tabular-q]"):
        text = text.replace("[task.agents.tabular-q.hyperparameters]",
                            "[task.agents.tabular.hyperparameters]")
    with pytest.raises(spec.SuiteError) as caught:
        _checked(text)
    assert caught.value.path == path, caught.value
    assert hint in str(caught.value)


def test_declared_couplings_pass_the_load_check_and_become_coupling_objects():
    from needbench.envs import Coupling

    coupling = """
[[task.kwargs.couplings]]
source = "energy"
target = "water"
gain = 0.05
side = "above"
"""
    (job,) = spec.expand(_checked(CHECKED + coupling))
    assert job.task_arguments["couplings"] == (Coupling("energy", "water", 0.05, "above"),)
    with pytest.raises(spec.SuiteError) as caught:
        _checked(CHECKED + coupling.replace("gain", "gian"))
    assert caught.value.path == "task[0].kwargs.couplings[0].gian"
    with pytest.raises(spec.SuiteError) as caught:
        _checked(CHECKED + coupling.replace('side = "above"', 'side = "over"'))
    assert caught.value.path.startswith("task[0].kwargs") and "below" in str(caught.value)
