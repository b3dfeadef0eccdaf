"""Per-episode metrics: pure functions of an episode trace.

An episode trace is a ``dict[str, np.ndarray]`` recorded by the harness for one
evaluation episode of T steps (see the shared interfaces):

    level       (T+1, K)  levels h_0..h_T, in each need's unit
    set_point   (T+1, K)  set points h*_0..h*_T, same units
    band        (K,)      comfort band of each need, same units
    drive       (T+1,)    D(h_0)..D(h_T) as the env reported them (drive units)
    reward      (T,)      total reward received on each step
    reward_internal, reward_task  (T,)  the reward's parts
    alive       (T,)      alive after each step
    intake      (T, K)    amounts consumed on each step
    terminated, truncated ()  how the episode ended
    disturbance (T,)      optional: step t lies in a disturbance window

Index t = 0 is the state after reset; ``reward[t]`` is received on the step
from h_t to h_{t+1}. Deviations are counted in comfort-band units,
(h - h*) / band, so needs measured in different units add up; a need is in its
band when |h - h*| <= band. The drive is never recomputed here: the task's
drive object has already scored each state into ``trace["drive"]``.

Every metric is a scalar; :func:`episode_metrics` collects them for one
episode and :func:`summarise` averages them over episodes.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from needbench.agents.curves import EpisodeFigures, check_discount, stability_of_episode
from needbench.envs.errors import ConfigError

Trace = Mapping[str, np.ndarray]

#: Any discount: it does not enter the undiscounted figures read with it.
DEFAULT_GAMMA = 1.0


# ----------------------------------------------------------------------------
# Reading a trace
# ----------------------------------------------------------------------------

def _array(trace: Trace, key: str) -> np.ndarray:
    if key not in trace:
        raise ConfigError(f"trace[{key!r}]", "<missing>",
                          f"an array under {key!r} (keys present: {sorted(trace)})")
    return np.asarray(trace[key])


def episode_length(trace: Trace) -> int:
    """T, the number of steps taken (the length of ``trace["reward"]``)."""
    reward = _array(trace, "reward")
    if reward.ndim != 1 or reward.shape[0] < 1:
        raise ConfigError("trace['reward']", f"array of shape {reward.shape}",
                          "a 1-D array with one reward per step, at least one step")
    return int(reward.shape[0])


def _per_step(trace: Trace, key: str) -> np.ndarray:
    """A (T,) per-step array, e.g. a reward."""
    steps = episode_length(trace)
    values = _array(trace, key)
    if values.shape != (steps,):
        raise ConfigError(f"trace[{key!r}]", f"array of shape {values.shape}",
                          f"shape ({steps},), one value per step")
    return values.astype(np.float64) if values.dtype != bool else values


def _drive(trace: Trace) -> np.ndarray:
    """The (T+1,) drives D(h_0)..D(h_T)."""
    steps = episode_length(trace)
    drive = _array(trace, "drive").astype(np.float64)
    if drive.shape != (steps + 1,):
        raise ConfigError("trace['drive']", f"array of shape {drive.shape}",
                          f"shape ({steps + 1},): D(h_0) from reset, then one per step")
    return drive


def _offset(trace: Trace) -> tuple[np.ndarray, np.ndarray]:
    """Signed offsets h_t - h*_t, shape (T+1, K), in need units, and the (K,) bands."""
    steps = episode_length(trace)
    level = _array(trace, "level").astype(np.float64)
    set_point = _array(trace, "set_point").astype(np.float64)
    band = _array(trace, "band").astype(np.float64)
    if level.ndim != 2 or level.shape[0] != steps + 1:
        raise ConfigError("trace['level']", f"array of shape {level.shape}",
                          f"shape ({steps + 1}, K): h_0 from reset, then one row per step")
    if set_point.shape != level.shape:
        raise ConfigError("trace['set_point']", f"array of shape {set_point.shape}",
                          f"shape {level.shape}, the same as trace['level']")
    if band.shape != (level.shape[1],) or not np.all(band > 0):
        raise ConfigError("trace['band']", band.tolist(),
                          f"{level.shape[1]} comfort bands, each > 0")
    return level - set_point, band


def band_deviation(trace: Trace) -> np.ndarray:
    """(h_t - h*_t) / band for t = 0..T, shape (T+1, K), in band units (signed)."""
    offset, band = _offset(trace)
    return offset / band


def deviation_norm(trace: Trace) -> np.ndarray:
    """||(h_t - h*_t) / band||_2 for t = 0..T, shape (T+1,), in band units."""
    return np.linalg.norm(band_deviation(trace), axis=-1)


def _check_gamma(gamma: float) -> float:
    return check_discount("gamma", gamma)


def _discount_weights(steps: int, gamma: float) -> np.ndarray:
    """gamma^t for t = 0..T-1."""
    return np.power(_check_gamma(gamma), np.arange(steps, dtype=np.float64))


# ----------------------------------------------------------------------------
# Returns
# ----------------------------------------------------------------------------

def episode_return(trace: Trace) -> float:
    """Undiscounted return, sum_{t=0}^{T-1} r_t, in reward units."""
    return float(np.sum(_per_step(trace, "reward")))


def extrinsic_return(trace: Trace) -> float:
    """Undiscounted task (extrinsic) return, sum_t reward_task_t, unweighted, in task units."""
    return float(np.sum(_per_step(trace, "reward_task")))


def discounted_return(trace: Trace, gamma: float) -> float:
    """Discounted return, sum_{t=0}^{T-1} gamma^t r_t, in reward units.

    For the drive-reduction reward r_t = D_t - D_{t+1} this telescopes to

        D_0 - ((1 - gamma) / gamma) * sum_{t=1}^{T-1} gamma^t D_t - gamma^(T-1) D_T,

    so maximising it minimises the discounted drive (Keramati & Gutkin 2014).
    """
    reward = _per_step(trace, "reward")
    return float(np.sum(_discount_weights(reward.shape[0], gamma) * reward))


# ----------------------------------------------------------------------------
# Stability: drive and deviation
# ----------------------------------------------------------------------------

def episode_stability(trace: Trace, gamma: float) -> EpisodeFigures:
    """Return, length, discounted drive, time in band and per-need deviation of the trace,
    summed by the one accumulator training curves use too
    (:func:`needbench.agents.curves.stability_of_episode`; its docstring holds the convention).
    """
    offset, band = _offset(trace)
    return stability_of_episode(_per_step(trace, "reward"), _drive(trace),
                                np.all(np.abs(offset[1:]) <= band, axis=-1),
                                offset[1:] / band, _check_gamma(gamma))


def discounted_drive(trace: Trace, gamma: float) -> float:
    """Discounted drive, sum_{t=0}^{T-1} gamma^t D(h_t), in drive units; lower is better.

    Starts at the reset state h_0 and stops before the final state h_T, the
    states in which the agent chose an action (see :func:`episode_stability`).
    """
    return episode_stability(trace, gamma).discounted_drive


def normalised_discounted_drive(trace: Trace, gamma: float) -> float:
    """(1 - gamma) / (1 - gamma^T) * discounted drive, in drive units; lower is better.

    The weights gamma^t / sum_{s<T} gamma^s sum to one, so this is a weighted
    average of D(h_0)..D(h_{T-1}) and comparable across episode lengths
    (at gamma = 1 it is the plain mean).
    """
    weights = _discount_weights(episode_length(trace), gamma)
    return discounted_drive(trace, gamma) / float(np.sum(weights))


def discounted_deviation(trace: Trace, gamma: float) -> float:
    """sum_{t=0}^{T-1} gamma^t ||(h_t - h*_t) / band||_2, in band units; lower is better.

    A drive-free measure of stability: the Euclidean distance to the set point
    with each need counted in units of its own comfort band.
    """
    norm = deviation_norm(trace)[:-1]
    return float(np.sum(_discount_weights(norm.shape[0], gamma) * norm))


def normalised_discounted_deviation(trace: Trace, gamma: float) -> float:
    """(1 - gamma) / (1 - gamma^T) * discounted deviation: a weighted average, in band units."""
    norm = deviation_norm(trace)[:-1]
    weights = _discount_weights(norm.shape[0], gamma)
    return float(np.sum(weights * norm) / np.sum(weights))


def mean_absolute_deviation(trace: Trace) -> np.ndarray:
    """Per-need mean of |h_t - h*_t| / band over t = 1..T, shape (K,), in band units.

    The reset state h_0 is left out: it was not the agent's doing.
    """
    return episode_stability(trace, DEFAULT_GAMMA).deviation


def time_in_band(trace: Trace) -> float:
    """Share of steps t = 1..T with every need in its band, |h_t - h*_t| <= band; in [0, 1]."""
    return episode_stability(trace, DEFAULT_GAMMA).time_in_band


def overconsumption(trace: Trace) -> float:
    """Mean excess above the set points, in band units per step; 0 if never above.

        overconsumption = (1 / T) * sum_{t=1}^{T} sum_i max(0, (h_{t,i} - h*_{t,i}) / band_i)

    Deficits do not count, so this separates overshooting (eating or drinking
    past satiety, overheating) from the symmetric deviation measures.
    """
    excess = np.maximum(band_deviation(trace)[1:], 0.0)
    return float(np.sum(excess) / excess.shape[0])


def survived(trace: Trace) -> bool:
    """True unless the episode terminated.

    With the tasks' default ``on_lethal="terminate"``, an episode terminates
    exactly when a need leaves its lethal bounds, so an episode that did not
    terminate ended alive at the time limit. Under ``on_lethal="penalise"`` the
    body can leave its bounds without terminating: see :func:`time_alive`.
    """
    return not bool(np.asarray(_array(trace, "terminated")))


def time_alive(trace: Trace) -> float:
    """Share of steps t = 1..T after which the body was alive (every need within
    its lethal bounds), from ``trace["alive"]``; in [0, 1]."""
    return float(np.mean(_per_step(trace, "alive").astype(bool)))


# ----------------------------------------------------------------------------
# Anticipation and comparison with a reference
# ----------------------------------------------------------------------------

def disturbance_deviation(trace: Trace) -> float:
    """Mean deviation norm over the steps of the disturbance windows, in band units.

    ``trace["disturbance"][t]`` marks step t (the transition h_t -> h_{t+1})
    as inside a window, so the states scored are the h_{t+1} with
    disturbance[t] true: mean of ||(h_{t+1} - h*_{t+1}) / band||_2 over them.
    NaN if the episode had no disturbance step.
    """
    window = _per_step(trace, "disturbance").astype(bool)
    if not np.any(window):
        return float("nan")
    return float(np.mean(deviation_norm(trace)[1:][window]))


def anticipation(trace: Trace, baseline: Trace | float) -> float:
    """Deviation during disturbances relative to a reactive baseline; a ratio, lower is better.

        anticipation = disturbance_deviation(trace) / disturbance_deviation(baseline)

    The baseline is a reactive agent (e.g. the set-point controller, which acts
    only on the current deviation) on the same disturbances: a trace, or its
    disturbance deviation as a number. Below 1 the agent deviates less than the
    baseline inside the windows, as an agent that corrects ahead of a
    forewarned disturbance would; 1 means no better than reacting; above 1 worse.
    """
    if isinstance(baseline, Mapping):
        reference = disturbance_deviation(baseline)
    else:
        reference = float(baseline)
    if not np.isfinite(reference) or reference <= 0:
        raise ConfigError("baseline", baseline,
                          "a baseline trace with disturbance steps, or its disturbance "
                          "deviation as a finite number > 0")
    return disturbance_deviation(trace) / reference


def optimality_gap(value: float, optimal_value: float, *, higher_is_better: bool = True) -> float:
    """How far a metric falls short of a reference optimum, in the metric's unit.

        gap = optimal_value - value   if higher is better (a return),
        gap = value - optimal_value   if lower is better (a discounted drive).

    0 means optimal; positive means short of the optimum. Negative values
    (beating the reference, e.g. through sampling noise or an approximate
    planner) are kept, not clipped, so they stay visible.
    """
    value, optimal_value = float(value), float(optimal_value)
    return optimal_value - value if higher_is_better else value - optimal_value


# ----------------------------------------------------------------------------
# All metrics of an episode, and their mean over episodes
# ----------------------------------------------------------------------------

def episode_metrics(trace: Trace, gamma: float,
                    need_names: Sequence[str] | None = None) -> dict[str, float]:
    """Every metric that applies to the trace, keyed by name.

    Keys: ``length``, ``return``, ``discounted_return``, ``discounted_drive``,
    ``normalised_discounted_drive``, ``discounted_deviation``,
    ``normalised_discounted_deviation``, ``time_in_band``, ``overconsumption``,
    ``survived`` (1.0 or 0.0), ``deviation/<need>`` (per-need mean absolute
    deviation), plus ``time_alive`` when the trace has ``alive``,
    ``extrinsic_return`` when it has ``reward_task`` and
    ``disturbance_deviation`` when it has a disturbance step. Needs are
    named ``need_0``, ``need_1``... when ``need_names`` is not given.
    """
    gamma = _check_gamma(gamma)
    stability = episode_stability(trace, gamma)
    per_need = stability.deviation
    if need_names is None:
        need_names = [f"need_{i}" for i in range(per_need.shape[0])]
    if len(need_names) != per_need.shape[0]:
        raise ConfigError("need_names", list(need_names),
                          f"{per_need.shape[0]} names, one per need of the trace")
    metrics = {
        "length": float(episode_length(trace)),
        "return": episode_return(trace),
        "discounted_return": discounted_return(trace, gamma),
        "discounted_drive": stability.discounted_drive,
        "normalised_discounted_drive": normalised_discounted_drive(trace, gamma),
        "discounted_deviation": discounted_deviation(trace, gamma),
        "normalised_discounted_deviation": normalised_discounted_deviation(trace, gamma),
        "time_in_band": stability.time_in_band,
        "overconsumption": overconsumption(trace),
        "survived": float(survived(trace)),
    }
    if "alive" in trace:
        metrics["time_alive"] = time_alive(trace)
    if "reward_task" in trace:
        metrics["extrinsic_return"] = extrinsic_return(trace)
    if "disturbance" in trace and np.any(trace["disturbance"]):
        metrics["disturbance_deviation"] = disturbance_deviation(trace)
    for name, value in zip(need_names, per_need, strict=True):
        metrics[f"deviation/{name}"] = float(value)
    return metrics


def summarise(episodes: Sequence[Mapping[str, float]]) -> dict[str, float]:
    """Mean of each metric over episodes, plus ``episodes`` (the count) and ``survival``.

    ``survival`` replaces ``survived``: the share of episodes that did not
    terminate, i.e. that reached the time limit alive. A metric missing from
    some episodes (``disturbance_deviation``) is averaged over those that have it.
    """
    if len(episodes) == 0:
        raise ConfigError("episodes", [], "metrics of at least one episode")
    keys = sorted({key for episode in episodes for key in episode})
    summary = {"episodes": float(len(episodes))}
    for key in keys:
        values = [float(episode[key]) for episode in episodes if key in episode]
        summary["survival" if key == "survived" else key] = float(np.mean(values))
    return summary
