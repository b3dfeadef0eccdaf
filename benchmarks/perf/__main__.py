"""needbench's performance table: every figure beside a reference measured in the same run.

    python -m needbench.benchmarks.perf [--quick] [--json FILE] [--only NAME ...]

Each row is one measurement: our figure, the reference it is held to (measured
here, now, on the same machine), their ratio, the target for the ratio and
whether it is met. Timed figures take the best of several alternating rounds,
the round least disturbed by other work on the machine. ``--quick`` uses
shorter rounds and fewer tasks (under 2 minutes); the full run takes about 10.
It prints and writes figures; it asserts nothing (the test suite checks only
that it runs and writes valid JSON).

Rows:

* ``single/<task>``: seconds per ``env.step`` through ``gymnasium.make``,
  against CartPole-v1's; target ratio <= 3.
* ``vector/<task>``: env-steps/s of the native vector env at N = 1024, against
  CartPole's vector env; target >= 0.5 (Forage 0.25, ForageWide 0.1).
* ``core/B=<B>``: env-steps/s of the physiology kernel alone (every dynamics
  term on, drive and survival scored), against CartPole's vector env at the
  same B; target >= 0.5.
* ``compile/warm``: seconds to import ``needbench.envs`` and take a first step
  with a warm cache (a fresh process); target <= 1. ``compile/cold/<family>``:
  seconds of a family's first step with an empty cache; target <= 15.
* ``ppo/make_vec_env`` and ``ppo/needbench``: share of SB3 PPO's training wall
  time spent stepping the envs on Forage (the reference is the whole: 1),
  through SB3's ``make_vec_env`` (8 single envs, SB3's default PPO) and through
  needbench's own adapter (the ``ppo`` agent's settings); targets < 0.15, < 0.10.
* ``tabular/64-seeds``: tabular-q agent-steps/s, 64 seeds in one pass against
  one seed on a single env; target >= 20.
* ``sweep/2-workers`` and ``sweep/ray``: wall time of the quickstart suite on
  1 local worker against 2, and on the local pool against Ray (2 CPUs);
  targets >= 1.7 and >= 0.8.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import gymnasium as gym
import numpy as np

import needbench.envs

#: Vector targets that differ from 0.5 (ForageWide's observation has 203 numbers).
VECTOR_TARGETS = {"Forage": 0.25, "ForageWide": 0.1}
QUICK_TASKS = ("needbench/Menu-v0", "needbench/Forage-v0", "needbench/Shift-v0")


@dataclass(frozen=True)
class Row:
    """One measurement beside its reference."""

    name: str
    value: float
    reference: float
    ratio: float
    target: float
    higher_is_better: bool
    unit: str
    note: str = ""

    @property
    def met(self) -> bool:
        return self.ratio >= self.target if self.higher_is_better else self.ratio <= self.target

    def as_json(self) -> dict:
        return {**asdict(self), "met": self.met}


def family(task_id: str) -> str:
    return task_id.split("/")[1].rsplit("-v", 1)[0]


def best_rate(functions: dict[str, Callable[[], None]], seconds: float,
              rounds: int) -> dict[str, float]:
    """Calls per second of each function, measured in alternating rounds; best round kept."""
    best = dict.fromkeys(functions, 0.0)
    for function in functions.values():  # warm-up: compilation, first allocations
        for _ in range(20):
            function()
    for _ in range(rounds):
        for name, function in functions.items():
            calls, start = 0, time.perf_counter()
            while (elapsed := time.perf_counter() - start) < seconds / rounds:
                for _ in range(20):
                    function()
                calls += 20
            best[name] = max(best[name], calls / elapsed)
    return best


def single_stepper(task_id: str) -> Callable[[], None]:
    env = gym.make(task_id)
    env.reset(seed=0)
    env.action_space.seed(0)
    actions = [env.action_space.sample() for _ in range(1000)]
    position = [0]

    def step():
        i = position[0] = (position[0] + 1) % len(actions)
        _, _, terminated, truncated, _ = env.step(actions[i])
        if terminated or truncated:
            env.reset()

    return step


def vector_stepper(task_id: str, copies: int) -> Callable[[], None]:
    env = gym.make_vec(task_id, num_envs=copies, vectorization_mode="vector_entry_point")
    env.reset(seed=0)
    env.action_space.seed(0)
    actions = [env.action_space.sample() for _ in range(16)]
    position = [0]

    def step():
        position[0] = (position[0] + 1) % len(actions)
        env.step(actions[position[0]])

    return step


def core_stepper(copies: int) -> Callable[[], None]:
    """The physiology kernel alone: every dynamics term on, drive and survival scored."""
    from needbench.envs.drives import HomeostaticDrive
    from needbench.envs.physiology import advance_bodies
    from needbench.envs.presets import abstract
    from needbench.envs.rewards import RewardChannel, settle_batch
    from needbench.envs.streams import CopyStreams

    body = abstract().physiology(overrides={
        "energy": {"adaptation_rate": 0.001, "noise": 0.01},
        "water": {"uptake_rate": 0.8, "noise": 0.01},
        "temperature": {"noise": 0.01},
    })
    k = body.num_needs
    drive = HomeostaticDrive(scale=body.band, num_needs=k)
    streams = CopyStreams(np.arange(copies, dtype=np.uint64) + 1)
    level, gut, set_point = (np.array(a) for a in body.initial(streams, copies))
    before, set_point_before = level.copy(), set_point.copy()
    intake = np.zeros((copies, k))
    intake[:, 0] = 0.02
    activity = np.full(copies, 0.5)
    ambient = np.zeros((copies, k))
    zeros = np.zeros((copies, k))
    channel, bias = RewardChannel().parameters(k)
    drives, reward, internal = drive(level, set_point), np.zeros(copies), np.zeros(copies)
    alive = np.ones(copies, np.bool_)
    scratch, work = np.zeros((2, k)), np.zeros((1, k))
    task, palatability = np.zeros(copies), np.zeros(copies)

    def step():
        before[...] = level
        set_point_before[...] = set_point
        advance_bodies(level, gut, set_point, intake, activity, ambient, zeros, True,
                       body.coefficients, body.coupling, body.coupling_below, body.flags,
                       streams.keys, streams.counter, scratch)
        settle_batch(before, set_point_before, level, set_point, intake, zeros, False, task,
                     palatability, drives, body.coefficients, channel, bias, drive.table(k),
                     drive.exponents, work, reward, internal, alive)

    return step


def step_rows(tasks: tuple[str, ...], seconds: float, rounds: int, copies: int) -> list[Row]:
    rows = []
    cartpole = best_rate({"single": single_stepper("CartPole-v1"),
                          "vector": vector_stepper("CartPole-v1", copies)}, seconds, rounds)
    for task_id in tasks:
        rates = best_rate({"single": single_stepper(task_id),
                           "vector": vector_stepper(task_id, copies)}, seconds, rounds)
        ratio = cartpole["single"] / rates["single"]
        rows.append(Row(f"single/{family(task_id)}", 1e6 / rates["single"],
                        1e6 / cartpole["single"], ratio, 3.0, False, "us/step",
                        "gymnasium.make, against CartPole-v1"))
        value, reference = rates["vector"] * copies, cartpole["vector"] * copies
        rows.append(Row(f"vector/{family(task_id)}", value, reference, value / reference,
                        VECTOR_TARGETS.get(family(task_id), 0.5), True, "env-steps/s",
                        f"N = {copies}, against CartPole's vector env"))
    return rows


def core_rows(batches: tuple[int, ...], seconds: float, rounds: int) -> list[Row]:
    rows = []
    for batch in batches:
        rates = best_rate({"core": core_stepper(batch),
                           "cartpole": vector_stepper("CartPole-v1", batch)}, seconds, rounds)
        value, reference = rates["core"] * batch, rates["cartpole"] * batch
        rows.append(Row(f"core/B={batch}", value, reference, value / reference, 0.5, True,
                        "env-steps/s", "every dynamics term on, against CartPole's vector env"))
    return rows


def _python(code: str, cache: str) -> float:
    """Wall seconds of ``code`` in a fresh interpreter whose numba cache is ``cache``."""
    env = {**os.environ, "NUMBA_CACHE_DIR": cache}
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], check=True, env=env)
    return time.perf_counter() - start


def compile_rows(tasks: tuple[str, ...]) -> list[Row]:
    first_step = ("import gymnasium as gym, needbench.envs; e = gym.make({!r}); "
                  "e.reset(seed=0); e.step(e.action_space.sample())")
    baseline = "import gymnasium as gym; e = gym.make('CartPole-v1'); e.reset(seed=0); e.step(0)"
    rows = []
    with tempfile.TemporaryDirectory() as cache:
        reference = min(_python(baseline, cache) for _ in range(2))
        colds = {task_id: _python(first_step.format(task_id), cache) for task_id in tasks}
        warm = min(_python(first_step.format(tasks[0]), cache) for _ in range(2))
    rows.append(Row("compile/warm", warm - reference, reference, warm - reference, 1.0, False,
                    "s", f"import and first step of {family(tasks[0])}, warm cache, beyond "
                         "CartPole's import and first step (the reference)"))
    # A family compiled after another reuses the shared kernels' cache: the first
    # family's figure is the honest cold cost of the whole engine.
    for task_id, seconds in colds.items():
        rows.append(Row(f"compile/cold/{family(task_id)}", seconds - reference, reference,
                        seconds - reference, 15.0, False, "s",
                        "first step with an empty cache (after the families above)"))
    return rows


def ppo_rows(steps: int) -> list[Row]:
    from stable_baselines3 import PPO
    from stable_baselines3.common.env_util import make_vec_env

    task_id = "needbench/Forage-v0"
    rows = []

    def share_of(vec_env, learn: Callable[[], None]) -> tuple[float, float]:
        inner, spent = vec_env, [0.0]
        while hasattr(inner, "venv"):
            inner = inner.venv
        for name in ("step_wait", "reset"):
            method = getattr(inner, name)

            def timed(*args, _method=method, **kwargs):
                start = time.perf_counter()
                try:
                    return _method(*args, **kwargs)
                finally:
                    spent[0] += time.perf_counter() - start

            setattr(inner, name, timed)
        start = time.perf_counter()
        learn()
        total = time.perf_counter() - start
        return spent[0] / total, total

    vec = make_vec_env(task_id, n_envs=8, seed=0)
    model = PPO("MlpPolicy", vec, seed=0, device="cpu", verbose=0)
    share, total = share_of(vec, lambda: model.learn(steps))
    rows.append(Row("ppo/make_vec_env", share, 1.0, share, 0.15, False, "share",
                    f"env share of {total:.1f} s of PPO training ({steps} steps, 8 copies)"))

    from needbench.benchmarks.perf.ppo_env_share import ENGINE_CALLS, measure

    figures = measure(task_id, steps, seed=0, copies=None)
    share = sum(figures[name] for name in ENGINE_CALLS) / figures["learn"]
    rows.append(Row("ppo/needbench", share, 1.0, share, 0.10, False, "share",
                    f"engine share of {figures['learn']:.1f} s of PPO training through "
                    f"needbench's adapter ({figures['copies']} copies)"))
    return rows


def tabular_rows(steps: int) -> list[Row]:
    from needbench.benchmarks.perf.tabular_batch import batched_rate, single_rate

    batched_rate(64, 50)  # warm-up
    batched, single = batched_rate(64, steps), single_rate(steps)
    return [Row("tabular/64-seeds", batched, single, batched / single, 20.0, True,
                "agent-steps/s", "64 seeds in one pass, against 1 seed on a single env")]


def sweep_rows() -> list[Row]:
    def run(*options: str) -> float:
        with tempfile.TemporaryDirectory() as out:
            start = time.perf_counter()
            subprocess.run([sys.executable, "-m", "needbench.benchmarks.cli", "run", "quickstart",
                            "--out", out, "--quiet", *options], check=True,
                           stdout=subprocess.DEVNULL)
            return time.perf_counter() - start

    one, two = run("--workers", "1"), run("--workers", "2")
    ray = run("--workers", "2", "--backend", "ray")
    return [Row("sweep/2-workers", two, one, one / two, 1.7, True, "s",
                "quickstart on 2 local workers, against 1 (ratio: speed-up)"),
            Row("sweep/ray", ray, two, two / ray, 0.8, True, "s",
                "quickstart on Ray (2 CPUs), against the local pool of 2 (ratio: speed)")]


def measure(quick: bool, only: set[str] | None) -> list[Row]:
    tasks = QUICK_TASKS if quick else needbench.envs.TASK_IDS
    seconds, rounds = (0.6, 3) if quick else (2.0, 5)
    groups: dict[str, Callable[[], list[Row]]] = {
        "steps": lambda: step_rows(tasks, seconds, rounds, 1024),
        "core": lambda: core_rows((1024, 16384), seconds, rounds),
        "compile": lambda: compile_rows(tasks[:2] if quick else tasks),
        "ppo": lambda: ppo_rows(8192 if quick else 32768),
        "tabular": lambda: tabular_rows(500 if quick else 2000),
        "sweep": sweep_rows,
    }
    rows: list[Row] = []
    for name, group in groups.items():
        if only is None or name in only:
            rows += group()
            print(f"measured: {name}", file=sys.stderr, flush=True)
    return rows


def table(rows: list[Row]) -> str:
    lines = [f"{'row':<22} {'ours':>14} {'reference':>14} {'ratio':>7} {'target':>9}  met  unit",
             "-" * 86]
    for row in rows:
        sign = ">=" if row.higher_is_better else "<="
        lines.append(f"{row.name:<22} {row.value:>14,.4g} {row.reference:>14,.4g} "
                     f"{row.ratio:>7.3g} {sign + format(row.target, 'g'):>9}  "
                     f"{'yes' if row.met else 'NO ':<4} {row.unit}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m needbench.benchmarks.perf",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short rounds, three tasks")
    parser.add_argument("--json", metavar="FILE", help="also write the rows as JSON")
    parser.add_argument("--only", nargs="+", metavar="GROUP",
                        choices=("steps", "core", "compile", "ppo", "tabular", "sweep"),
                        help="measure only these groups")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    rows = measure(args.quick, set(args.only) if args.only else None)
    print(table(rows))
    print(f"{sum(r.met for r in rows)} of {len(rows)} targets met; "
          f"measured in {time.perf_counter() - started:.0f} s")
    if args.json:
        Path(args.json).write_text(json.dumps([r.as_json() for r in rows], indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
