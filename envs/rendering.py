"""Frames for ``render()``: the world's picture (or its text), then a labelled gauge per need.

A gauge spans the lethal range of its need; the comfort band is marked, the
set point is a tick, and the current level is a cursor. Text frames use plain
ASCII so that logs stay readable. Image frames (``rgb_array``) are uint8
arrays built with NumPy alone, at least :data:`MIN_SIDE` pixels on the short
side; their words are drawn with :data:`FONT`, a 5 x 7 bitmap font of our own,
so frames need no plotting library.

Colours keep one meaning in every task: the agent is always
:data:`AGENT_COLOUR` (magenta); each need has one colour (:func:`need_colour`:
energy orange, water blue, temperature red), used for its sources on maps
and for the swatch of its gauge; the comfort band is green.
"""

from __future__ import annotations

import math
import struct
import textwrap
import zlib
from pathlib import Path

import numpy as np

GAUGE_WIDTH = 31

#: The agent, in every task's picture.
AGENT_COLOUR = np.array([210, 40, 200], np.uint8)
#: The outline that keeps the agent visible on any ground.
AGENT_OUTLINE = np.array([20, 20, 20], np.uint8)
#: One colour per need, by name, on maps and gauges alike.
NEED_COLOURS = {
    "energy": np.array([235, 145, 35], np.uint8),
    "water": np.array([55, 115, 230], np.uint8),
    "temperature": np.array([220, 55, 55], np.uint8),
}
#: Colours of further needs, in the order the body declares them.
OTHER_NEED_COLOURS = (np.array([40, 170, 160], np.uint8), np.array([160, 150, 50], np.uint8),
                      np.array([150, 150, 150], np.uint8))
BAND_COLOUR = np.array([120, 200, 120], np.uint8)
TRACK_COLOUR = np.array([70, 70, 70], np.uint8)
CURSOR_COLOUR = np.array([250, 250, 250], np.uint8)
SET_POINT_COLOUR = np.array([30, 110, 30], np.uint8)
BACKGROUND_COLOUR = np.array([28, 28, 32], np.uint8)
TEXT_COLOUR = np.array([235, 235, 235], np.uint8)
DIM_TEXT_COLOUR = np.array([160, 160, 165], np.uint8)

#: Short side of every rgb_array frame, at least, in pixels.
MIN_SIDE = 256
#: Width of a frame unless the world's picture is wider, in pixels.
FRAME_WIDTH = 448
#: Pixels per font pixel of labels.
TEXT_SCALE = 2
MARGIN = 8


def need_colour(name: str, index: int) -> np.ndarray:
    """The colour of need ``name``, the ``index``-th need of its body."""
    if name in NEED_COLOURS:
        return NEED_COLOURS[name]
    return OTHER_NEED_COLOURS[index % len(OTHER_NEED_COLOURS)]


# --- the font ----------------------------------------------------------------------------

#: 5 x 7 glyphs: seven rows of five bits each (16 is the leftmost column), as hex pairs;
#: letters that reach below the line (g j p q y) have nine rows.
_GLYPHS = {
    " ": "00000000000000", "!": "04040404040004", "\"": "0A0A0000000000",
    "#": "0A0A1F0A1F0A0A", "$": "040F140E051E04", "%": "18190204081303",
    "&": "0C12140815120D", "'": "04040000000000", "(": "02040808080402",
    ")": "08040202020408", "*": "0004150E150400", "+": "0004041F040400",
    ",": "000000000C0408", "-": "0000001F000000", ".": "00000000000C0C",
    "/": "00010204081000", "0": "0E11131519110E", "1": "040C040404040E",
    "2": "0E11010204081F", "3": "1F02040201110E", "4": "02060A121F0202",
    "5": "1F101E0101110E", "6": "0608101E11110E", "7": "1F010204080808",
    "8": "0E11110E11110E", "9": "0E11110F01020C", ":": "000C0C000C0C00",
    ";": "000C0C000C0408", "<": "02040810080402", "=": "00001F001F0000",
    ">": "08040201020408", "?": "0E110102040004", "@": "0E11010D15150E",
    "A": "0E11111F111111", "B": "1E11111E11111E", "C": "0E11101010110E",
    "D": "1C12111111121C", "E": "1F10101E10101F", "F": "1F10101E101010",
    "G": "0E11101711110F", "H": "1111111F111111", "I": "0E04040404040E",
    "J": "0702020202120C", "K": "11121418141211", "L": "1010101010101F",
    "M": "111B1515111111", "N": "11111915131111", "O": "0E11111111110E",
    "P": "1E11111E101010", "Q": "0E11111115120D", "R": "1E11111E141211",
    "S": "0F10100E01011E", "T": "1F040404040404", "U": "1111111111110E",
    "V": "11111111110A04", "W": "1111111515150A", "X": "11110A040A1111",
    "Y": "1111110A040404", "Z": "1F01020408101F", "[": "0E08080808080E",
    "\\": "00100804020100", "]": "0E02020202020E", "^": "040A1100000000",
    "_": "0000000000001F", "`": "08040000000000", "a": "00000E010F110F",
    "b": "1010161911111E", "c": "00000E1010110E", "d": "01010D1311110F",
    "e": "00000E111F100E", "f": "0609081C080808", "g": "00000F11110F01010E",
    "h": "10101619111111", "i": "04000C0404040E", "j": "02000602020202120C",
    "k": "10101214181412", "l": "0C04040404040E", "m": "00001A15151111",
    "n": "00001619111111", "o": "00000E1111110E", "p": "00001E11111E101010",
    "q": "00000F11110F010101", "r": "00001619101010", "s": "00000E100E011E",
    "t": "08081C08080906", "u": "0000111111130D", "v": "00001111110A04",
    "w": "0000111115150A", "x": "0000110A040A11", "y": "00001111110F01010E",
    "z": "00001F0204081F", "{": "02040408040402", "|": "04040404040404",
    "}": "08040402040408", "~": "00000815020000",
}


GLYPH_HEIGHT, GLYPH_WIDTH = 9, 5


def _glyph(code: str) -> np.ndarray:
    rows = [int(code[i:i + 2], 16) for i in range(0, len(code), 2)]
    rows += [0] * (GLYPH_HEIGHT - len(rows))
    return np.array([[(row >> (4 - column)) & 1 for column in range(GLYPH_WIDTH)]
                     for row in rows], dtype=bool)


#: The font: a (9, 5) boolean glyph per printable ASCII character.
FONT = {character: _glyph(code) for character, code in _GLYPHS.items()}
#: Pixels a character takes, before scaling: the glyph and a pixel of spacing each way.
CELL_HEIGHT, CELL_WIDTH = GLYPH_HEIGHT + 1, GLYPH_WIDTH + 1


def text_width(text: str, scale: int = TEXT_SCALE) -> int:
    """Width in pixels of ``text`` drawn at ``scale``."""
    return len(text) * CELL_WIDTH * scale


def draw_text(picture: np.ndarray, text: str, row: int, column: int,
              colour: np.ndarray = TEXT_COLOUR, scale: int = TEXT_SCALE) -> None:
    """Draw ``text`` into ``picture`` (H, W, 3) with its top left corner at (row, column).

    Characters outside printable ASCII are drawn as ``?``; what falls outside
    the picture is cut off.
    """
    height, width = picture.shape[:2]
    for i, character in enumerate(text):
        glyph = FONT.get(character, FONT["?"])
        if scale > 1:
            glyph = np.repeat(np.repeat(glyph, scale, axis=0), scale, axis=1)
        top, left = row, column + i * CELL_WIDTH * scale
        bottom, right = min(top + glyph.shape[0], height), min(left + glyph.shape[1], width)
        if bottom <= max(top, 0) or right <= max(left, 0):
            continue
        window = glyph[max(-top, 0):bottom - top, max(-left, 0):right - left]
        region = picture[max(top, 0):bottom, max(left, 0):right]
        region[window] = colour


def text_block(lines: list[str], width: int, colour: np.ndarray = TEXT_COLOUR,
               scale: int = TEXT_SCALE) -> np.ndarray:
    """(H, width, 3) uint8: ``lines`` wrapped to ``width``, on the frame's background."""
    per_line = max((width - 2 * MARGIN) // (CELL_WIDTH * scale), 1)
    wrapped = [piece for line in lines
               for piece in (textwrap.wrap(line, per_line, break_on_hyphens=False) or [""])]
    line_height = CELL_HEIGHT * scale
    block = np.empty((len(wrapped) * line_height + MARGIN, width, 3), np.uint8)
    block[:] = BACKGROUND_COLOUR
    for i, line in enumerate(wrapped):
        draw_text(block, line, MARGIN // 2 + i * line_height, MARGIN, colour, scale)
    return block


# --- gauges ------------------------------------------------------------------------------

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


#: Pixels of one need's gauge: its label line, its bar, the level and the lethal bounds.
GAUGE_ROW = 60
_BAR_TOP, _BAR_HEIGHT = 22, 14


def gauge_image(core, index: int, width: int) -> np.ndarray:
    """(GAUGE_ROW K, width, 3) uint8: a labelled gauge per need.

    Each gauge: a swatch of the need's colour, its name, set point and unit;
    under them the bar over the lethal range, the comfort band in green, the
    set point as a dark tick and the level as a white cursor; under the bar
    the level in figures and the lethal bounds at the bar's two ends.
    """
    body, physiology = core.body, core.physiology
    rows = []
    bar_left, bar_width = MARGIN, width - 2 * MARGIN
    for k, need in enumerate(physiology.needs):
        row = np.empty((GAUGE_ROW, width, 3), np.uint8)
        row[:] = BACKGROUND_COLOUR
        set_point = float(body.set_point[index, k])
        level = float(body.level[index, k])
        row[3:3 + 14, bar_left:bar_left + 14] = need_colour(need.name, k)
        draw_text(row, f"{need.name}: set point {set_point:.3g} {need.unit}", 2, bar_left + 20)
        top, bottom = _BAR_TOP, _BAR_TOP + _BAR_HEIGHT
        bar = row[:, bar_left:bar_left + bar_width]
        bar[top:bottom] = TRACK_COLOUR
        low, high = need.lethal_low, need.lethal_high
        a = _position(set_point - need.band, low, high, bar_width)
        b = _position(set_point + need.band, low, high, bar_width)
        bar[top:bottom, a:b + 1] = BAND_COLOUR
        tick = _position(set_point, low, high, bar_width)
        bar[top - 3:bottom + 3, max(tick - 1, 0):tick + 1] = SET_POINT_COLOUR
        cursor = _position(level, low, high, bar_width)
        bar[top - 4:bottom + 4, max(cursor - 3, 0):cursor + 4] = AGENT_OUTLINE
        bar[top - 3:bottom + 3, max(cursor - 1, 0):cursor + 2] = CURSOR_COLOUR
        value = f"now {level:.3g}"
        draw_text(row, value, bottom + 4, (width - text_width(value)) // 2)
        draw_text(row, f"{low:g}", bottom + 5, bar_left, DIM_TEXT_COLOUR, 1)
        label = f"{high:g}"
        draw_text(row, label, bottom + 5, bar_left + bar_width - text_width(label, 1),
                  DIM_TEXT_COLOUR, 1)
        rows.append(row)
    return np.concatenate(rows, axis=0)


# --- frames ------------------------------------------------------------------------------

def _upscaled(picture: np.ndarray) -> np.ndarray:
    """The world's picture enlarged by a whole factor until its short side is MIN_SIDE."""
    factor = max(1, math.ceil(MIN_SIDE / min(picture.shape[:2])))
    if factor > 1:
        picture = np.repeat(np.repeat(picture, factor, axis=0), factor, axis=1)
    return picture


def _centred(picture: np.ndarray, width: int) -> np.ndarray:
    out = np.empty((picture.shape[0], width, 3), np.uint8)
    out[:] = BACKGROUND_COLOUR
    left = (width - picture.shape[1]) // 2
    out[:, left:left + picture.shape[1]] = picture
    return out


def frame(core, index: int, mode: str):
    """The frame of copy ``index`` in ``mode`` (``ansi`` or ``rgb_array``).

    ``rgb_array``: (H, W, 3) uint8 with H, W >= :data:`MIN_SIDE`: the step
    count, the world's picture (or, for worlds without one, their text
    frame in the bitmap font), then the labelled gauges.
    """
    step = f"t = {int(core.t[index])} / {core.max_steps}"
    if mode == "ansi":
        world = core.world.text(core.state, index)
        return "\n".join(part for part in (step, world, gauge_text(core, index)) if part) + "\n"
    picture = core.world.image(core.state, index)
    if picture is not None:
        picture = _upscaled(np.asarray(picture, dtype=np.uint8))
    width = max(FRAME_WIDTH, picture.shape[1] + 2 * MARGIN if picture is not None else 0)
    parts = [text_block([step], width)]
    if picture is not None:
        parts.append(_centred(picture, width))
    else:
        world = core.world.text(core.state, index)
        if world:
            parts.append(text_block(world.splitlines(), width))
    parts.append(gauge_image(core, index, width))
    image = np.concatenate(parts, axis=0)
    if image.shape[0] < MIN_SIDE:
        padding = np.empty((MIN_SIDE - image.shape[0], width, 3), np.uint8)
        padding[:] = BACKGROUND_COLOUR
        image = np.concatenate([image, padding], axis=0)
    return image


def with_caption(picture: np.ndarray, caption: str) -> np.ndarray:
    """``picture`` with a line of text above it (e.g. the action taken and the reward)."""
    return np.concatenate([text_block([caption], picture.shape[1]), picture], axis=0)


# --- files -------------------------------------------------------------------------------

def png_bytes(picture: np.ndarray) -> bytes:
    """An (H, W, 3) uint8 picture as a PNG file (8-bit RGB, no filter), with zlib alone."""
    picture = np.ascontiguousarray(picture, dtype=np.uint8)
    if picture.ndim != 3 or picture.shape[2] != 3:
        raise ValueError(f"a picture of shape {picture.shape}; expected (H, W, 3)")
    height, width = picture.shape[:2]

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    rows = np.concatenate([np.zeros((height, 1), np.uint8), picture.reshape(height, -1)], axis=1)
    header = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header)
            + chunk(b"IDAT", zlib.compress(rows.tobytes(), 6)) + chunk(b"IEND", b""))


def write_png(picture: np.ndarray, path: str | Path) -> Path:
    """Write ``picture`` (H, W, 3) uint8 to ``path`` as PNG."""
    path = Path(path)
    path.write_bytes(png_bytes(picture))
    return path
