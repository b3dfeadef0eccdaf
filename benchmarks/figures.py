"""The figures of a report, drawn with matplotlib's Agg backend (no display needed).

Every function here takes plain data (traces, estimates, need descriptions)
and returns a ``matplotlib.figure.Figure`` of :data:`FIGURE_SIZE`; it never
reads a store, so each figure can be tested on data made by hand. Figures
are made without pyplot (no global figure registry to leak into), and
:func:`save_png` writes one at exactly :data:`FIGURE_PIXELS`.

Colours: :data:`PALETTE` is our own list, picked by the usual rules for
readers with a colour-vision deficiency (hues spread around the wheel, mixed
lightness so neighbours also differ in grey, no red next to green), and
:func:`agent_colours` gives each agent one colour for every figure of a page.
Each agent also keeps one marker, so a print in grey still tells them apart.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.patches  # noqa: E402  (the backend is chosen first)
import matplotlib.ticker  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

#: Our palette: (name, hex colour), in the order agents receive them.
PALETTE: tuple[tuple[str, str], ...] = (
    ("deep harbour", "#1b5e9f"),
    ("saffron", "#f0a030"),
    ("lagoon", "#1a9e8f"),
    ("brick", "#c8553d"),
    ("heather", "#6b4a94"),
    ("cornflower", "#79b4e3"),
    ("moss", "#76823a"),
    ("graphite", "#4d4d4d"),
)
#: Markers paired with the palette's colours, so agents differ in shape too.
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
#: Background marks: comfort band fill, set point and lethal-bound lines.
BAND_COLOUR = "#cfe8d5"
SET_POINT_COLOUR = "#2f6b3b"
LETHAL_COLOUR = "#7a1f1f"
#: Markers of task events in the trace figure, cycled by event name.
EVENT_MARKERS = ("|", "v", "^", "x", "d", "+", "1", "*")
#: Line styles of the sweep points of one agent, in turn.
LINE_STYLES = ("-", "--", "-.", ":", (0, (6, 2, 1, 2, 1, 2)), (0, (1, 4)), (0, (8, 3)),
               (0, (3, 1, 3, 1, 1, 1)))

#: Size of every figure: inches at :data:`DPI` dots per inch.
FIGURE_SIZE = (10.0, 6.0)
DPI = 100
FIGURE_PIXELS = (int(FIGURE_SIZE[0] * DPI), int(FIGURE_SIZE[1] * DPI))


@dataclass(frozen=True)
class Style:
    """How one agent (series) is drawn."""

    colour: str
    marker: str


def agent_colours(agents: Sequence[str]) -> dict[str, Style]:
    """One :class:`Style` per agent name, in the order given (sorted names make pages agree)."""
    styles = {}
    for index, agent in enumerate(dict.fromkeys(agents)):
        styles[agent] = Style(PALETTE[index % len(PALETTE)][1], MARKERS[index % len(MARKERS)])
    return styles


def new_figure(rows: int = 1, columns: int = 1, **kwargs: Any) -> tuple[Figure, np.ndarray]:
    """A figure of :data:`FIGURE_SIZE` with a grid of axes (always a 2-D array)."""
    figure = Figure(figsize=FIGURE_SIZE, dpi=DPI, layout="constrained")
    axes = figure.subplots(rows, columns, squeeze=False, **kwargs)
    return figure, axes


def png_bytes(figure: Figure) -> bytes:
    """The figure as PNG bytes, exactly :data:`FIGURE_PIXELS` in size."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=DPI)
    return buffer.getvalue()


def save_png(figure: Figure, path: str | Path) -> bytes:
    """Write the figure as a PNG file (folders made as needed) and return its bytes."""
    data = png_bytes(figure)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return data


def note_missing_intervals(axis: Any, note: str | None) -> None:
    """A small note in the corner of a panel, e.g. why some whiskers are missing."""
    if note:
        axis.text(0.005, 0.005, note, transform=axis.transAxes, ha="left", va="bottom",
                  fontsize=7, color="#444444")


# ----------------------------------------------------------------------------
# 1. Internal-state traces
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class NeedInfo:
    """What the trace figure needs to know of one need (from ``core.physiology``)."""

    name: str
    unit: str
    lethal_low: float
    lethal_high: float


def _event_steps(trace: Mapping[str, np.ndarray], need_count: int) -> dict[str, np.ndarray]:
    """Steps (1-based: the state after the step) of each task event of a trace.

    Events are the boolean per-step keys a task puts in its info (``cue``,
    ``disturbance``, ``lure``, ``eaten``...), marked where they turn true (so
    a window or a lasting state shows as its onset), every step with an
    intake of any need, and the last step of an episode that terminated.
    """
    steps = np.asarray(trace["reward"]).shape[0]
    skip = {"alive", "reward", "reward_internal", "reward_task", "action", "terminated",
            "truncated"}
    events: dict[str, np.ndarray] = {}
    intake = np.asarray(trace.get("intake", np.zeros((steps, need_count))))
    if intake.ndim == 2 and intake.shape[0] == steps:
        eaten = np.flatnonzero(np.any(intake > 0, axis=1))
        if eaten.size:
            events["intake"] = eaten + 1
    if bool(np.asarray(trace.get("terminated", False))):
        events["terminated (lethal level)"] = np.array([steps])
    for key in sorted(trace):
        values = np.asarray(trace[key])
        if key in skip or values.shape != (steps,) or values.dtype != bool:
            continue
        hits = np.flatnonzero(values & ~np.concatenate([[False], values[:-1]]))
        if hits.size:
            events[key] = hits + 1
    return events


def _level_limits(levels: list[np.ndarray], set_points: list[np.ndarray], band: float,
                  low: float, high: float) -> tuple[float, float, bool, bool]:
    """y limits of one need's panel, and whether each lethal bound is in view.

    The view covers the data and the band; a lethal bound joins it unless it
    would squash the data into less than a third of the panel.
    """
    data = np.concatenate([*levels, *set_points])
    bottom = min(float(np.min(data)), float(np.min(np.concatenate(set_points))) - band)
    top = max(float(np.max(data)), float(np.max(np.concatenate(set_points))) + band)
    span = top - bottom
    show_low = bottom - low <= 2 * span
    show_high = high - top <= 2 * span
    bottom = min(bottom, low) if show_low else bottom
    top = max(top, high) if show_high else top
    margin = 0.05 * (top - bottom)
    return bottom - margin, top + margin, show_low, show_high


def trace_figure(task: str, episodes: Mapping[str, Mapping[str, np.ndarray]],
                 needs: Sequence[NeedInfo], styles: Mapping[str, Style],
                 time_unit: str = "step") -> Figure:
    """Each need over one evaluation episode per agent, with set point, band, bounds, events.

    Args:
        task: task name, for the title.
        episodes: {agent label: trace} (``benchmarks.evaluate`` traces).
        needs: one :class:`NeedInfo` per need, in trace order.
        styles: {agent label: Style}.
        time_unit: label of the time axis.
    """
    count = len(needs)
    figure, axes = new_figure(count + 1, 1, sharex=True,
                              height_ratios=[3] * count + [max(1, len(episodes)) * 0.5])
    figure.suptitle(f"{task}: internal state over one evaluation episode per agent")
    for index, need in enumerate(needs):
        axis = axes[index, 0]
        levels = [np.asarray(trace["level"])[:, index] for trace in episodes.values()]
        set_points = [np.asarray(trace["set_point"])[:, index] for trace in episodes.values()]
        band = float(np.asarray(next(iter(episodes.values()))["band"])[index])
        # The band follows the set point of the longest episode (set points may move).
        first_set_point = max(set_points, key=len)
        time = np.arange(first_set_point.shape[0])
        axis.fill_between(time, first_set_point - band, first_set_point + band,
                          color=BAND_COLOUR, label="comfort band", step="mid")
        axis.plot(time, first_set_point, color=SET_POINT_COLOUR, linestyle="--", linewidth=1.2,
                  label="set point")
        low, high, show_low, show_high = _level_limits(levels, set_points, band,
                                                       need.lethal_low, need.lethal_high)
        lethal_label = "lethal bound"
        for shown, bound in ((show_low, need.lethal_low), (show_high, need.lethal_high)):
            if shown:
                axis.axhline(bound, color=LETHAL_COLOUR, linestyle=":", linewidth=1.5,
                             label=lethal_label)
                lethal_label = None
        hidden = [f"{side} {bound:g}" for shown, side, bound in
                  ((show_low, "low", need.lethal_low), (show_high, "high", need.lethal_high))
                  if not shown]
        if hidden:
            axis.text(0.995, 0.03, "lethal bound off scale: " + ", ".join(hidden),
                      transform=axis.transAxes, ha="right", va="bottom", fontsize=8,
                      color=LETHAL_COLOUR)
        for (label, _), level in zip(episodes.items(), levels, strict=True):
            axis.plot(np.arange(level.shape[0]), level, color=styles[label].colour,
                      linewidth=1.6, label=label)
        axis.set_ylim(low, high)
        axis.set_ylabel(f"{need.name} ({need.unit})")
        if index == 0:
            axis.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8,
                        title="agent and marks", title_fontsize=8)
    _event_strip(axes[count, 0], episodes, count, styles)
    axes[count, 0].set_xlabel(f"time ({time_unit}s since reset)")
    return figure


def _event_strip(axis: Any, episodes: Mapping[str, Mapping[str, np.ndarray]], need_count: int,
                 styles: Mapping[str, Style]) -> None:
    """Task events of each agent's episode as markers on one row per agent."""
    names: list[str] = []
    labels = list(episodes)
    for row, (label, trace) in enumerate(episodes.items()):
        for name, steps in _event_steps(trace, need_count).items():
            if name not in names:
                names.append(name)
            marker = EVENT_MARKERS[names.index(name) % len(EVENT_MARKERS)]
            axis.scatter(steps, np.full(steps.shape, row), marker=marker, s=18,
                         color=styles[label].colour, linewidths=1.0)
    handles = [Line2D([], [], linestyle="", marker=EVENT_MARKERS[i % len(EVENT_MARKERS)],
                          color="#333333", label=name) for i, name in enumerate(names)]
    axis.set_yticks(range(len(labels)), labels, fontsize=8)
    axis.set_ylim(-0.6, len(labels) - 0.4)
    axis.set_ylabel("events")
    if handles:
        axis.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8,
                    title="task events", title_fontsize=8)
    else:
        axis.text(0.5, 0.5, "no task events in these episodes", transform=axis.transAxes,
                  ha="center", va="center", fontsize=8)


def path_figure(task: str, paths: Mapping[str, np.ndarray], styles: Mapping[str, Style]) -> Figure:
    """The agent's path on the map, one line per agent.

    Args:
        paths: {agent label: (T, 2) positions from the trace's ``position``}:
            (x, y) in [0, 1] x [0, 1] on a continuous map (Arena), or whole
            (row, column) cells on a grid (Forage), drawn with north up.
    """
    figure, axes = new_figure()
    axis = axes[0, 0]
    grid = all(np.issubdtype(np.asarray(p).dtype, np.integer) for p in paths.values())
    for label, path in paths.items():
        path = np.asarray(path, dtype=np.float64)
        if grid:  # (row, column) -> (x = column, y = row), rows counted downward
            path = path[:, ::-1]
        style = styles[label]
        axis.plot(path[:, 0], path[:, 1], color=style.colour, linewidth=1.2, alpha=0.85,
                  label=label)
        axis.plot(path[0, 0], path[0, 1], marker=style.marker, color=style.colour,
                  markersize=9, markeredgecolor="black", linestyle="")
        axis.plot(path[-1, 0], path[-1, 1], marker="X", color=style.colour, markersize=10,
                  markeredgecolor="black", linestyle="")
    axis.plot([], [], marker="o", color="#999999", markeredgecolor="black", linestyle="",
              label="start (agent's marker)")
    axis.plot([], [], marker="X", color="#999999", markeredgecolor="black", linestyle="",
              label="end")
    axis.set_aspect("equal")
    if grid:
        extent = max(float(np.max(p)) for p in paths.values()) + 1.0
        axis.set_xlim(-0.5, extent)
        axis.set_ylim(extent, -0.5)  # row 0 (north) at the top
        axis.set_xlabel("column (cells)")
        axis.set_ylabel("row (cells, north at the top)")
    else:
        axis.set_xlim(0, 1)
        axis.set_ylim(0, 1)
        axis.set_xlabel("x position (share of the map's width)")
        axis.set_ylabel("y position (share of the map's height)")
    axis.set_title(f"{task}: path on the map over the same episodes")
    axis.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8)
    return figure


# ----------------------------------------------------------------------------
# 2. Stability versus return
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Point:
    """One agent at one sweep point: (IQM, low, high) on both axes."""

    agent: str
    label: str
    x: tuple[float, float, float]
    y: tuple[float, float, float]


def pareto_front(points: Sequence[tuple[float, float]]) -> list[int]:
    """Indices of the points no other point beats: higher x and lower y are better.

    Sorted by x. A point is dominated when another is at least as good on both
    axes and better on one.
    """
    front = []
    for i, (x, y) in enumerate(points):
        dominated = any((ox >= x and oy <= y) and (ox > x or oy < y)
                        for j, (ox, oy) in enumerate(points) if j != i)
        if not dominated:
            front.append(i)
    return sorted(front, key=lambda i: points[i][0])


def tradeoff_figure(task: str, points: Sequence[Point], styles: Mapping[str, Style],
                    x_title: str, y_title: str, note: str | None = None) -> Figure:
    """Stability (y, lower is better) against return (x, higher is better), with CIs."""
    figure, axes = new_figure()
    axis = axes[0, 0]
    seen: set[str] = set()
    # Sweep points of one agent that land on the same spot share one label.
    labels: dict[tuple[str, float, float], list[str]] = {}
    for point in points:
        style = styles[point.agent]
        x, y = point.x, point.y
        axis.errorbar([x[0]], [y[0]], xerr=[[x[0] - x[1]], [x[2] - x[0]]],
                      yerr=[[y[0] - y[1]], [y[2] - y[0]]], color=style.colour,
                      marker=style.marker, markersize=8, capsize=3, linestyle="",
                      label=point.agent if point.agent not in seen else None)
        seen.add(point.agent)
        if point.label != point.agent:
            spot = (point.agent, float(f"{x[0]:.3g}"), float(f"{y[0]:.3g}"))
            labels.setdefault(spot, []).append(point.label.removeprefix(point.agent).strip())
    for (agent, x_value, y_value), texts in labels.items():
        axis.annotate("\n".join(texts), (x_value, y_value), textcoords="offset points",
                      xytext=(6, 6), fontsize=7, color=styles[agent].colour)
    front = pareto_front([(point.x[0], point.y[0]) for point in points])
    if front:
        axis.plot([points[i].x[0] for i in front], [points[i].y[0] for i in front],
                  color="#222222", linewidth=1.0, linestyle="--", zorder=0,
                  label="Pareto front (no point is better on both axes)")
    axis.set_xlabel(x_title + ", higher is better")
    axis.set_ylabel(y_title + ", lower is better")
    axis.set_title(f"{task}: stability against return, IQM over runs with 95% CI")
    axis.legend(loc="best", fontsize=8)
    axis.grid(alpha=0.3)
    note_missing_intervals(axis, note)
    return figure


# ----------------------------------------------------------------------------
# 3. Learning curves
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Curve:
    """One series of a learning-curve panel: step grid, IQM and CI band (NaN where none)."""

    agent: str
    label: str
    steps: np.ndarray
    centre: np.ndarray
    low: np.ndarray
    high: np.ndarray
    runs: int


def learning_figure(task: str, panels: Sequence[tuple[str, Sequence[Curve]]],
                    styles: Mapping[str, Style]) -> Figure:
    """One panel per metric (title with unit, curves); x is the training step."""
    figure, axes = new_figure(1, len(panels))
    for axis, (title, curves) in zip(axes[0], panels, strict=True):
        repeats: dict[str, int] = {}
        for curve in curves:
            style = styles[curve.agent]
            # Sweep points of one agent share its colour and differ in line style and marker.
            repeat = repeats.get(curve.agent, 0)
            repeats[curve.agent] = repeat + 1
            shown = np.isfinite(curve.centre)
            axis.plot(curve.steps[shown], curve.centre[shown], color=style.colour,
                      linewidth=1.6, linestyle=LINE_STYLES[repeat % len(LINE_STYLES)],
                      marker=MARKERS[repeat % len(MARKERS)], markevery=max(1, shown.sum() // 6),
                      markersize=5, label=f"{curve.label} ({curve.runs} runs)")
            band = np.isfinite(curve.low)
            if np.any(band):
                axis.fill_between(curve.steps[band], curve.low[band], curve.high[band],
                                  color=style.colour, alpha=0.2, linewidth=0)
        axis.set_xlabel("training steps (env steps over all copies)")
        axis.set_ylabel(title)
        axis.grid(alpha=0.3)
        axis.legend(loc="best", fontsize=8)
    figure.suptitle(f"{task}: learning curves, IQM over seeds (shaded: 95% CI with 3+ runs)")
    return figure


# ----------------------------------------------------------------------------
# 4. Per-need deviation
# ----------------------------------------------------------------------------

def deviation_figure(task: str, needs: Sequence[str],
                     bars: Mapping[str, Sequence[tuple[float, float, float] | None]],
                     styles: Mapping[str, Style], agent_of: Mapping[str, str],
                     note: str | None = None) -> Figure:
    """Grouped bars: per need, one bar per agent of its mean |h - h*| / band, with CI."""
    figure, axes = new_figure()
    axis = axes[0, 0]
    count = max(1, len(bars))
    width = 0.8 / count
    centres = np.arange(len(needs))
    for index, (label, values) in enumerate(bars.items()):
        style = styles[agent_of[label]]
        heights = np.array([np.nan if v is None else v[0] for v in values])
        errors = np.array([[0.0, 0.0] if v is None else [v[0] - v[1], v[2] - v[0]]
                           for v in values]).T
        axis.bar(centres - 0.4 + width * (index + 0.5), heights, width * 0.92,
                 yerr=errors, capsize=3, color=style.colour, edgecolor="black",
                 linewidth=0.5, label=label)
    axis.set_xticks(centres, needs)
    axis.set_xlabel("need")
    axis.set_ylabel("mean |h - h*| / band (comfort-band units)")
    axis.axhline(1.0, color=SET_POINT_COLOUR, linestyle="--", linewidth=1.0,
                 label="edge of the comfort band")
    axis.set_title(f"{task}: deviation per need, IQM over runs with 95% CI (lower is better)")
    axis.legend(loc="best", fontsize=8)
    axis.grid(axis="y", alpha=0.3)
    note_missing_intervals(axis, note)
    return figure


# ----------------------------------------------------------------------------
# 5. The drive landscape
# ----------------------------------------------------------------------------

def drive_figure(drive: Callable[[np.ndarray, np.ndarray], np.ndarray], names: Sequence[str],
                 units: Sequence[str], set_point: Sequence[float], band: Sequence[float],
                 description: str, outcome: float = 1.0) -> Figure:
    """The drive over two needs, and the reward of one fixed outcome at several states.

    Args:
        drive: a needbench drive object (``make_drive`` or ``core.drive``),
            called as ``drive(level, set_point)`` on (..., 2) arrays.
        names, units, set_point, band: the two needs.
        description: the drive's name and parameters, for the title.
        outcome: the fixed outcome, an intake of ``outcome`` comfort bands of
            the first need; its reward is the drive reduction D(h) - D(h + k).
    """
    set_point = np.asarray(set_point, dtype=np.float64)
    band = np.asarray(band, dtype=np.float64)
    figure, axes = new_figure(1, 2)
    reach = 4.0
    a = set_point[0] + band[0] * np.linspace(-reach, reach, 241)
    b = set_point[1] + band[1] * np.linspace(-reach, reach, 241)
    grid = np.stack(np.meshgrid(a, b), axis=-1)
    values = np.asarray(drive(grid, np.broadcast_to(set_point, grid.shape)))
    left = axes[0, 0]
    levels = matplotlib.ticker.MaxNLocator(12).tick_values(0.0, float(np.quantile(values, 0.98)))
    filled = left.contourf(a, b, values, levels=levels, cmap="cividis", extend="max")
    left.contour(a, b, values, levels=levels, colors="white", linewidths=0.5)
    figure.colorbar(filled, ax=left, label="drive D(h) (drive units)")
    left.add_patch(matplotlib.patches.Rectangle(
        (set_point[0] - band[0], set_point[1] - band[1]), 2 * band[0], 2 * band[1],
        fill=False, edgecolor=BAND_COLOUR, linewidth=2.0, label="comfort band"))
    left.plot(*set_point, marker="*", markersize=16, color=PALETTE[1][1],
              markeredgecolor="black", linestyle="", label="set point h*")
    left.set_xlabel(f"{names[0]} ({units[0]})")
    left.set_ylabel(f"{names[1]} ({units[1]})")
    left.set_title("drive over two needs")
    left.legend(loc="upper right", fontsize=8)

    right = axes[0, 1]
    intake = np.array([outcome * band[0], 0.0])
    offsets = (0.0, 1.0, 2.0, 3.0)
    for index, offset in enumerate(offsets):
        level = np.stack([a, np.full_like(a, set_point[1] - offset * band[1])], axis=-1)
        sp = np.broadcast_to(set_point, level.shape)
        reward = np.asarray(drive(level, sp)) - np.asarray(drive(level + intake, sp))
        right.plot(a, reward, color=PALETTE[index][1], linewidth=1.8,
                   marker=MARKERS[index], markevery=40,
                   label=f"{names[1]} {offset:g} band{'s' if offset != 1 else ''} below "
                   "its set point" if offset else f"{names[1]} at its set point")
    right.axvline(set_point[0], color=SET_POINT_COLOUR, linestyle="--", linewidth=1.0,
                  label=f"{names[0]} set point")
    right.axhline(0.0, color="#777777", linewidth=0.8)
    right.set_xlabel(f"{names[0]} before the outcome ({units[0]})")
    right.set_ylabel("reward r = D(h) - D(h + k) (drive units)")
    right.set_title(f"reward of one outcome: +{outcome:g} band of {names[0]}")
    right.legend(loc="best", fontsize=8)
    right.grid(alpha=0.3)
    figure.suptitle(f"The drive landscape: {description}")
    return figure


# ----------------------------------------------------------------------------
# Comparing two agents
# ----------------------------------------------------------------------------

def comparison_figure(title: str, rows: Sequence[tuple[str, tuple[float, float, float],
                                                       tuple[float, float, float]]],
                      metric_title: str, names: tuple[str, str],
                      styles: Mapping[str, Style], note: str | None = None) -> Figure:
    """Probability of improvement (left) and IQM difference (right), one row per task.

    Args:
        rows: (task label, P(X > Y) estimate, IQM difference estimate), each
            estimate (value, low, high); the aggregate row first.
    """
    figure, axes = new_figure(1, 2, sharey=True)
    labels = [row[0] for row in rows]
    y = np.arange(len(rows))[::-1]
    colour = styles[names[0]].colour
    for axis, column, reference, xlabel in (
            (axes[0, 0], 1, 0.5, f"P({names[0]} > {names[1]})"),
            (axes[0, 1], 2, 0.0, f"IQM({names[0]}) - IQM({names[1]}), {metric_title}")):
        values = np.array([row[column] for row in rows])
        axis.errorbar(values[:, 0], y, xerr=[values[:, 0] - values[:, 1],
                                             values[:, 2] - values[:, 0]],
                      marker=styles[names[0]].marker, color=colour, linestyle="", capsize=3,
                      markersize=7, label="estimate with 95% CI")
        axis.axvline(reference, color="#555555", linestyle="--", linewidth=1.0,
                     label="no difference")
        axis.set_xlabel(xlabel)
        axis.grid(alpha=0.3)
        axis.legend(loc="best", fontsize=8)
    axes[0, 0].set_yticks(y, labels)
    axes[0, 0].set_ylabel("task")
    axes[0, 0].set_xlim(-0.02, 1.02)
    note_missing_intervals(axes[0, 0], note)
    figure.suptitle(title)
    return figure
