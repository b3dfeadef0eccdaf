"""Frames for ``render()``: a need gauge per need, under the world's own picture.

A gauge spans the lethal range of its need; the comfort band is marked, and the
current level is a cursor. Text frames use plain ASCII so that logs stay
readable; image frames are small uint8 arrays built with NumPy alone.
"""

from __future__ import annotations

import numpy as np

GAUGE_WIDTH = 31
BAND_COLOUR = np.array([120, 200, 120], np.uint8)
TRACK_COLOUR = np.array([60, 60, 60], np.uint8)
CURSOR_COLOUR = np.array([250, 250, 250], np.uint8)
SET_POINT_COLOUR = np.array([40, 120, 40], np.uint8)


def _position(value: float, low: float, high: float, width: int) -> int:
    return int(np.clip(round((value - low) / (high - low) * (width - 1)), 0, width - 1))


def gauge_text(core, index: int) -> str:
    """One line per need: ``energy  [----==|==----]  0.35 band``."""
    body, physiology = core.body, core.physiology
    lines = []
    for k, need in enumerate(physiology.needs):
        low, high = need.lethal_low, need.lethal_high
        cells = ["-"] * GAUGE_WIDTH
        set_point = body.set_point[index, k]
        for j in range(_position(set_point - need.band, low, high, GAUGE_WIDTH),
                       _position(set_point + need.band, low, high, GAUGE_WIDTH) + 1):
            cells[j] = "="
        level = body.level[index, k]
        cells[_position(level, low, high, GAUGE_WIDTH)] = "|"
        lines.append(f"{need.name:<12}[{''.join(cells)}] {level:8.3f} {need.unit}")
    return "\n".join(lines)


def gauge_image(core, index: int, width: int) -> np.ndarray:
    """(8 K, width, 3) uint8 gauges, one row of height 8 per need."""
    body, physiology = core.body, core.physiology
    rows = []
    for k, need in enumerate(physiology.needs):
        row = np.zeros((8, width, 3), np.uint8)
        row[2:6, :] = TRACK_COLOUR
        low, high = need.lethal_low, need.lethal_high
        set_point = body.set_point[index, k]
        a = _position(set_point - need.band, low, high, width)
        b = _position(set_point + need.band, low, high, width)
        row[2:6, a:b + 1] = BAND_COLOUR
        row[1:7, _position(set_point, low, high, width)] = SET_POINT_COLOUR
        c = _position(body.level[index, k], low, high, width)
        row[:, max(c - 1, 0):c + 2] = CURSOR_COLOUR
        rows.append(row)
    return np.concatenate(rows, axis=0)


def frame(core, index: int, mode: str):
    """The frame of copy ``index`` in ``mode`` (``ansi`` or ``rgb_array``)."""
    if mode == "ansi":
        world = core.world.text(core.state, index)
        step = f"t = {int(core.t[index])} / {core.max_steps}"
        return "\n".join(part for part in (step, world, gauge_text(core, index)) if part) + "\n"
    picture = core.world.image(core.state, index)
    width = 96 if picture is None else picture.shape[1]
    gauges = gauge_image(core, index, width)
    if picture is None:
        return gauges
    return np.concatenate([picture.astype(np.uint8), gauges], axis=0)
