"""Physiology-core throughput beside Gymnasium's CartPole vector env, in one run.

Prints env-steps per second (steps x copies / second) of the physiology core
alone, with every dynamics term switched on (drain, activity cost, Newton
relaxation to a varying ambient, delayed gut uptake of intakes, couplings,
set-point adaptation, noise) and the drive computed every step, at B = 1 and
B = 1024, next to ``gymnasium.envs.classic_control.cartpole.CartPoleVectorEnv``
at the same B, and the ratio. The two are measured in alternating rounds and
the best round of each kept. Target: ratio >= 0.5 at B = 1024.

    python -m needbench.benchmarks.perf.core_throughput [--seconds 2]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from gymnasium.envs.classic_control.cartpole import CartPoleVectorEnv

from needbench.envs.drives import HomeostaticDrive
from needbench.envs.presets import abstract
from needbench.envs.streams import CopyStreams


def full_body():
    """The abstract body with every term on (adaptation and noise added)."""
    return abstract().physiology(overrides={
        "energy": {"adaptation_rate": 0.001, "noise": 0.01},
        "water": {"uptake_rate": 0.8, "noise": 0.01},
        "temperature": {"noise": 0.01},
    })


def calls_per_second(step, seconds: float) -> float:
    """Call ``step`` for about ``seconds``; return calls per second."""
    calls, start = 0, time.perf_counter()
    while (elapsed := time.perf_counter() - start) < seconds:
        for _ in range(50):
            step()
        calls += 50
    return calls / elapsed


def core_step(batch: int):
    body = full_body()
    drive = HomeostaticDrive(scale=body.band)
    streams = CopyStreams(np.arange(batch, dtype=np.uint64) + 1)
    state = [body.initial(streams, batch)]
    intake = np.zeros((batch, body.num_needs))
    intake[:, 0] = 0.02
    activity = np.full(batch, 0.5)
    ambient = np.zeros((batch, body.num_needs))
    phase = [0.0]

    def step():
        phase[0] += 0.01
        ambient[:, 2] = 2.0 * np.sin(phase[0])
        state[0] = body.transition(state[0], streams, intake=intake, activity=activity,
                                   ambient=ambient)
        drive(state[0].level, state[0].set_point)
        body.alive(state[0])

    return step


def cartpole_step(batch: int):
    env = CartPoleVectorEnv(num_envs=batch)
    env.reset(seed=0)
    actions = np.ones(batch, dtype=np.int64)
    return lambda: env.step(actions)


def best_rates(batch: int, seconds: float, rounds: int) -> tuple[float, float]:
    """Env-steps per second of the core and of CartPole, measured in alternating
    rounds; the best round of each is kept, the one least disturbed by other work
    on the machine."""
    core, cart = core_step(batch), cartpole_step(batch)
    for _ in range(20):  # warm-up
        core()
        cart()
    core_best = cart_best = 0.0
    for _ in range(rounds):
        core_best = max(core_best, calls_per_second(core, seconds / rounds) * batch)
        cart_best = max(cart_best, calls_per_second(cart, seconds / rounds) * batch)
    return core_best, cart_best


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=4.0,
                        help="time per measurement (split into rounds)")
    parser.add_argument("--rounds", type=int, default=8, help="alternating rounds per measurement")
    args = parser.parse_args(argv)
    print(f"{'B':>6} {'core env-steps/s':>18} {'CartPole vector':>18} {'ratio':>7}")
    for batch in (1, 1024):
        core, cart = best_rates(batch, args.seconds, args.rounds)
        print(f"{batch:>6} {core:>18,.0f} {cart:>18,.0f} {core / cart:>7.2f}")
    print("target: ratio >= 0.50 at B = 1024 (every dynamics term on)")


if __name__ == "__main__":
    main()
