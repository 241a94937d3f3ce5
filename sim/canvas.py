"""Our small drawing kit: line plots on a white sheet, drawn with Pillow, written as PNG.

A :class:`Sheet` is a picture ``width x height`` pixels. :meth:`Sheet.panel` places a
:class:`Panel` on it: a rectangle with an x and a y :class:`Scale` (linear or logarithmic)
that map data values to pixels. A panel draws grid lines, polylines (a :class:`Pen`:
colour, width, solid, dashed or dotted), markers (:class:`Marker`), lines across it, shaded
spans and bars, all clipped to its rectangle; then its axes (the left and bottom axis lines
with ticks and tick labels, a right-hand axis of named ticks, axis labels) and a legend
row above it. The sheet writes text anywhere: bold, grey, vertical.

Drawing is immediate: what is drawn later lies on top. Coordinates given to a sheet are
final pixels (floats; origin at the top left, y downwards); a panel takes data values.

Antialiasing: everything is drawn at ``SUPERSAMPLE`` times the final size (lines, markers
and text alike) and shrunk at the end by a box filter (:meth:`PIL.Image.Image.reduce`).
Clipping is exact to the pixel: lines, spans and bars are cut at the panel's edge
(geometrically), and what a line's width or a marker still puts beyond it is undone by
putting back the bands round the panel saved before it drew.

Text is Pillow's built-in scalable font (``ImageFont.load_default(size)``, FreeType). It
covers ASCII and a few Latin-1 signs: other characters a plot may carry (``Ω``, ``µ``,
``²``) are written with ASCII stand-ins (:data:`GLYPH_STAND_INS`). Each sheet loads its
own font objects, so two sheets may be drawn on two threads at once.
"""

from __future__ import annotations

import math
import os
import struct
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from PIL import Image, ImageColor, ImageDraw, ImageFont

from sim.fileio import atomic_path

#: Samples per pixel along each axis. 3 x 3 samples give 10 levels of coverage per
#: pixel and widths in thirds of a pixel: traces and slopes look smooth. 2 x 2, looked
#: at side by side, left traces visibly more jagged and thin lines uneven in weight, for
#: about 8 ms less per plot (the sheet's fresh memory and its reduction).
SUPERSAMPLE = 3
#: Sheet colour.
BACKGROUND = "white"
#: Axis lines, ticks and text unless a colour is given.
INK = "black"
#: Width of the axis lines and tick marks, in pixels (0.8 point at 100 dpi: a hairline
#: that still reads in print).
AXIS_WIDTH_PX = 1.1
#: Length of a tick mark outside the axis line, in pixels (3.5 points at 100 dpi: long
#: enough to see which label a tick belongs to).
TICK_LENGTH_PX = 5.0
#: Gap between a tick and its label, between a label and an axis title, and between a
#: legend sample and its text, in pixels (about a third of the label size).
LABEL_GAP_PX = 4.0
#: Size of tick labels and axis titles, in pixels (the em of the built-in font). 15 px
#: reads like a 10-point label at 100 dpi (the built-in face runs smaller than most).
LABEL_SIZE_PX = 15.0
#: Size of legend text, in pixels (a step below the labels: a legend is read once).
LEGEND_SIZE_PX = 12.0
#: Length of a legend's line sample and the space between two entries, in pixels.
LEGEND_SAMPLE_PX = 24.0
LEGEND_SPACING_PX = 22.0
#: Gap between a legend row's text and the top of its panel, in pixels.
LEGEND_LIFT_PX = 6.0
#: Extra stroke round each glyph of bold text, in final pixels: one and a half
#: supersampled pixels, which thickens the stems about as much as a bold face does
#: (compared by eye with a bold sans-serif title of the same size).
BOLD_STROKE_PX = 0.5
#: Distance between ticks an axis plans for, in pixels: along x room for a label of
#: about eight characters, along y about three label heights (labels there sit one
#: above the other and need less room).
X_TICK_SPACING_PX = 90.0
Y_TICK_SPACING_PX = 40.0
#: Least distance between two ticks kept on a log axis, whose evenly valued ticks crowd
#: towards the top of each decade: along y two label heights.
Y_LOG_TICK_CLEARANCE_PX = 30.0
#: Most ticks on an axis however long: more labels than this are hard to read at a glance.
MOST_TICKS = 10
#: Fewest ticks an axis is allowed to ask for: six always yields at least two. The step
#: chosen is at most 2.5 times one that gave more than six ticks (consecutive steps of
#: the ladder differ by at most 2.5 times), so the range spans more than 5 / 2.5 = 2 steps.
FEWEST_TICK_BUDGET = 6
#: Steps between ticks: these times a power of ten, as graph paper is labelled (common
#: practice; 2.5 gives quarters, which 2 and 5 alone skip).
TICK_LADDER = (1.0, 2.0, 2.5, 5.0)
#: Mantissas of the ticks per decade on a log axis, densest first (common practice).
LOG_TICK_SETS = ((1.0, 2.0, 5.0), (1.0,))
#: A log axis spanning less than this many decades gets ladder ticks (evenly spaced in
#: value, as the pitch axis of a sweep of one octave needs) instead of decade ticks.
LOG_DECADE_TICKS_FROM = 2.0
#: Decimals a tick label may need before labels switch to significant digits.
MAX_TICK_DECIMALS = 6
#: Significant digits of a tick label beyond MAX_TICK_DECIMALS.
TICK_SIGNIFICANT_DIGITS = 4
#: Relative slack when testing whether a tick lies on a limit or a value is a whole
#: multiple of a step (float steps such as 0.1 are not exact).
TICK_SLACK = 1e-9
#: Dash patterns in line widths (on, off): dashes long enough to read as dashes beside a
#: solid line, dots as round as a butt-capped stroke allows.
DASHES = {"solid": None, "dashed": (4.0, 2.0), "dotted": (1.0, 1.6)}
#: Shapes of a :class:`Marker`.
MARKER_SHAPES = ("circle", "x")
#: Width of the bands round a panel that are saved before it draws and put back after
#: (final pixels): wider than half the widest line and the largest marker, which are cut
#: geometrically at the panel's edge and so reach at most that far past it.
CLIP_GUARD_PX = 12.0
#: Half-width of a flat range made drawable by :func:`padded`, as a fraction of its value
#: (a flat 9 V rail is drawn from 8.1 to 9.9 V); 1 when the value is zero.
FLAT_RANGE_FRACTION = 0.1

#: PNG: the file signature (ISO/IEC 15948:2004, 5.2), and the header's fields for 8-bit
#: RGB (11.2.2 IHDR: bit depth 8, colour type 2 truecolour, compression method 0,
#: filter method 0, no interlace).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
PNG_RGB_HEADER = (8, 2, 0, 0, 0)
#: Scanline filter type 2, "Up" (9.2): each byte minus the one above it. A plot's rows
#: repeat (white, grid lines, flat traces), and measured on our plots at zlib level 1
#: the files come out 20 to 30 % smaller than with no filter or with "Sub", as small as
#: Pillow's own adaptive choice.
PNG_FILTER_UP = 2

#: ASCII stand-ins for characters the built-in font lacks (it covers ASCII and
#: ``© « ° ± ´ · » ‘ ’ “ ” … ‹ › ⁄ ™``). Micro as ``u`` is how parts lists write it in
#: ASCII (common practice); halfrail reads ``u`` back as micro.
GLYPH_STAND_INS = str.maketrans({"Ω": "ohm", "µ": "u", "μ": "u", "²": "^2", "³": "^3",
                                 "−": "-", "–": "-", "—": "-", "×": "x"})


# ---------------------------------------------------------------------------------
# scales and ticks


def nice_ticks(low: float, high: float, most: int, integer: bool = False) -> np.ndarray:
    """Evenly spaced ticks inside ``[low, high]``, a step of 1, 2, 2.5 or 5 times a power
    of ten, as many as fit in ``most`` (shape ``(count,)``, ascending).

    The step is the smallest on the ladder that gives at most ``most`` ticks, so the ticks
    reach to within one step of both ends. ``integer``: whole-number steps only (counts).
    """
    if not (math.isfinite(low) and math.isfinite(high) and low < high):
        raise ValueError(f"tick range must be finite and rising, got {low!r} to {high!r}")
    if most < 2:
        raise ValueError(f"most ticks must be at least 2, got {most!r}")
    exponent = math.floor(math.log10((high - low) / most))
    while True:
        for mantissa in TICK_LADDER:
            step = mantissa * 10.0 ** exponent
            if integer and (step < 1.0 or step != round(step)):
                continue
            first = math.ceil(low / step - TICK_SLACK)
            last = math.floor(high / step + TICK_SLACK)
            if last - first + 1 <= most:
                # whole multiples of the step: k * step (not a running sum, which drifts)
                return np.arange(first, last + 1) * step
        exponent += 1


def log_ticks(low: float, high: float, most: int) -> np.ndarray:
    """Ticks for a log axis over ``[low, high]`` (both > 0), shape ``(count,)``.

    From ``LOG_DECADE_TICKS_FROM`` decades on: 1, 2 and 5 times each power of ten, or
    the powers alone (every second, fifth... decade when they are many), whichever first
    fits in ``most``. A shorter span gets :func:`nice_ticks`, evenly spaced in value.
    """
    if not (0.0 < low < high and math.isfinite(high)):
        raise ValueError(f"log range must be positive and rising, got {low!r} to {high!r}")
    if math.log10(high / low) < LOG_DECADE_TICKS_FROM:
        return nice_ticks(low, high, most)
    decades = np.arange(math.floor(math.log10(low)), math.ceil(math.log10(high)) + 1)
    for mantissas in LOG_TICK_SETS:
        ticks = (np.array(mantissas)[None, :] * 10.0 ** decades[:, None]).ravel()
        ticks = ticks[(ticks >= low * (1 - TICK_SLACK)) & (ticks <= high * (1 + TICK_SLACK))]
        if ticks.size <= most:
            return ticks
    # every n-th decade, n a whole step of the ladder (2, 5, 10...)
    strides = nice_ticks(0.0, float(ticks.size - 1), most, integer=True)
    return ticks[::int(strides[1] - strides[0])]


def tick_labels(values: Sequence[float]) -> list[str]:
    """Labels for ``values`` with one number of decimals for all: the fewest that write
    every value exactly (``0.0 2.5 5.0``; ``-120 -100``); beyond ``MAX_TICK_DECIMALS``,
    ``TICK_SIGNIFICANT_DIGITS`` significant digits each."""
    values = [float(v) for v in values]
    scale = max((abs(v) for v in values), default=0.0) or 1.0
    for decimals in range(MAX_TICK_DECIMALS + 1):
        if all(abs(round(v, decimals) - v) <= TICK_SLACK * scale for v in values):
            # + 0.0 turns a rounded -0.0 into 0.0
            return [f"{round(v, decimals) + 0.0:.{decimals}f}" for v in values]
    return [f"{v:.{TICK_SIGNIFICANT_DIGITS}g}" for v in values]


def padded(low: float, high: float, fraction: float, log: bool = False) -> tuple[float, float]:
    """Limits ``fraction`` of the span beyond ``low`` and ``high`` on each side (of the
    span of the logarithms with ``log``); a flat range is widened by
    ``FLAT_RANGE_FRACTION`` of its value (1 when zero), or a factor 1.1 on a log axis."""
    if log:
        if high <= low:
            return low / (1.0 + FLAT_RANGE_FRACTION), high * (1.0 + FLAT_RANGE_FRACTION)
        ratio = (high / low) ** fraction
        return low / ratio, high * ratio
    if high <= low:
        half = abs(low) * FLAT_RANGE_FRACTION or 1.0
        return low - half, high + half
    margin = (high - low) * fraction
    return low - margin, high + margin


@dataclass(frozen=True)
class Scale:
    """How one axis maps values to a panel: ``low`` at the left (bottom), ``high`` at the
    right (top), linearly or by logarithm (``log``; both limits > 0).

    ``ticks``: values to mark (default: :func:`nice_ticks` or :func:`log_ticks` for the
    axis's length); ``format``: label of a tick value (default: :func:`tick_labels`, one
    number of decimals for all); ``integer``: whole-number ticks only (counts).
    """

    low: float
    high: float
    log: bool = False
    ticks: Sequence[float] | None = None
    format: Callable[[float], str] | None = None
    integer: bool = False

    def __post_init__(self):
        if not (math.isfinite(self.low) and math.isfinite(self.high) and self.low < self.high):
            raise ValueError(f"axis limits must be finite and rising, got {self.low!r} to "
                             f"{self.high!r}")
        if self.log and self.low <= 0.0:
            raise ValueError(f"a log axis needs positive limits, got {self.low!r}")

    def fraction(self, values) -> np.ndarray:
        """Where ``values`` lie along the axis: 0 at ``low``, 1 at ``high`` (any shape;
        values outside give fractions outside [0, 1], values <= 0 on a log axis NaN)."""
        v = np.asarray(values, dtype=np.float64)
        if self.log:
            with np.errstate(divide="ignore", invalid="ignore"):
                logs = np.log10(np.where(v > 0.0, v, np.nan))
            low, high = math.log10(self.low), math.log10(self.high)
            return (logs - low) / (high - low)
        return (v - self.low) / (self.high - self.low)

    def tick_values(self, length_px: float, spacing_px: float,
                    clearance_px: float | None = None) -> np.ndarray:
        """Tick values inside the limits, shape ``(count,)``: the given ``ticks``, or as
        many as fit ``length_px`` at ``spacing_px`` apart (between FEWEST_TICK_BUDGET and
        MOST_TICKS). On a log axis, ticks closer than ``clearance_px`` (default
        ``spacing_px``) to the last kept one are dropped."""
        clearance_px = spacing_px if clearance_px is None else clearance_px
        if self.ticks is not None:
            ticks = np.asarray(self.ticks, dtype=np.float64)
        else:
            most = int(min(MOST_TICKS, max(FEWEST_TICK_BUDGET, length_px // spacing_px + 1)))
            if self.log:
                ticks = log_ticks(self.low, self.high, most)
            else:
                ticks = nice_ticks(self.low, self.high, most, integer=self.integer)
        slack = TICK_SLACK * (self.high - self.low)
        ticks = ticks[(ticks >= self.low - slack) & (ticks <= self.high + slack)]
        if self.log and self.ticks is None and ticks.size:
            kept, last = [], -math.inf
            for value, at in zip(ticks, self.fraction(ticks) * length_px):
                if at - last >= clearance_px:
                    kept.append(value)
                    last = at
            ticks = np.array(kept)
        return ticks

    def tick_text(self, values: np.ndarray) -> list[str]:
        """Labels of tick ``values``: ``format`` of each, or :func:`tick_labels`."""
        if self.format is not None:
            return [self.format(float(v)) for v in values]
        return tick_labels(values)


# ---------------------------------------------------------------------------------
# pens, markers and fills


def mix(colour: str, other: str, fraction: float) -> str:
    """``colour`` moved ``fraction`` (0 to 1) of the way to ``other``, as ``#rrggbb``:
    a line drawn at opacity 1 - fraction over ``other``."""
    a, b = ImageColor.getrgb(colour)[:3], ImageColor.getrgb(other)[:3]
    return "#" + "".join(f"{round(x + (y - x) * fraction):02x}" for x, y in zip(a, b))


@dataclass(frozen=True)
class Pen:
    """A line: ``colour`` (``#rrggbb`` or a colour name), ``width`` in pixels, ``dash``
    one of ``DASHES`` (solid, dashed, dotted; the pattern scales with the width)."""

    colour: str
    width: float = 1.0
    dash: str = "solid"

    def __post_init__(self):
        if self.dash not in DASHES:
            raise ValueError(f"Unknown dash {self.dash!r}; choose from {', '.join(DASHES)}")
        if not self.width > 0.0:
            raise ValueError(f"pen width must be positive, got {self.width!r}")

    def _sample(self, draw: ImageDraw.ImageDraw, box: tuple[float, ...], k: int) -> None:
        left, top, right, bottom = box
        middle = (top + bottom) / 2.0
        _stroke(draw, np.array([[left, middle], [right, middle]]), self, k)


@dataclass(frozen=True)
class Marker:
    """A mark at each point: ``shape`` one of ``MARKER_SHAPES`` (a filled circle, or an
    x drawn with lines ``width`` pixels wide), ``size`` its diameter in pixels."""

    colour: str
    shape: str = "circle"
    size: float = 6.0
    width: float = 1.4

    def __post_init__(self):
        if self.shape not in MARKER_SHAPES:
            raise ValueError(f"Unknown marker shape {self.shape!r}; choose from "
                             f"{', '.join(MARKER_SHAPES)}")

    def _draw(self, draw: ImageDraw.ImageDraw, points: np.ndarray, k: int) -> None:
        r = self.size * k / 2.0
        line = _px(self.width, k)
        for x, y in points:
            if self.shape == "circle":
                draw.ellipse((x - r, y - r, x + r, y + r), fill=self.colour)
            else:
                draw.line((x - r, y - r, x + r, y + r), fill=self.colour, width=line)
                draw.line((x - r, y + r, x + r, y - r), fill=self.colour, width=line)

    def _sample(self, draw: ImageDraw.ImageDraw, box: tuple[float, ...], k: int) -> None:
        left, top, right, bottom = box
        self._draw(draw, np.array([[(left + right) / 2.0, (top + bottom) / 2.0]]), k)


@dataclass(frozen=True)
class Fill:
    """A filled area of ``colour`` (a legend entry for a shaded span)."""

    colour: str

    def _sample(self, draw: ImageDraw.ImageDraw, box: tuple[float, ...], k: int) -> None:
        draw.rectangle(box, fill=self.colour)


def _pixel_centre(at, k: int):
    """Supersampled coordinates ``at`` (a float or an array) moved to the centre of the
    final pixel they fall in: a thin line parallel to an axis then looks the same wherever
    it falls (common practice for hairlines on a pixel grid)."""
    return (np.floor((np.asarray(at) + 0.5) / k) + 0.5) * k - 0.5


def _px(width: float, k: int) -> int:
    """A width in final pixels as whole supersampled pixels (at least one)."""
    return max(1, round(width * k))


def dash_pieces(points: np.ndarray, on: float, off: float) -> list[list[float]]:
    """Cut the polyline ``points`` (shape ``(n, 2)``, pixels) into dashes ``on`` long with
    gaps ``off`` long, measured along the line from its start. Each dash is a flat list
    ``[x0, y0, x1, y1, ...]``: its start, the polyline's vertices inside it, its end."""
    steps = np.hypot(*np.diff(points, axis=0).T)
    along = np.concatenate([[0.0], np.cumsum(steps)])
    starts = np.arange(0.0, along[-1], on + off)
    ends = np.minimum(starts + on, along[-1])

    def at(distance: np.ndarray) -> np.ndarray:
        seg = np.clip(np.searchsorted(along, distance, side="right") - 1, 0, len(steps) - 1)
        length = steps[seg]
        t = np.divide(distance - along[seg], length, out=np.zeros_like(distance),
                      where=length > 0.0)
        return points[seg] + t[:, None] * (points[seg + 1] - points[seg])

    ends_xy = np.hstack([at(starts), at(ends)]).tolist()
    inside_from = np.searchsorted(along, starts, side="right")
    inside_to = np.searchsorted(along, ends, side="left")
    bent = np.flatnonzero(inside_to > inside_from)
    if not bent.size:  # straight dashes only (a line across a panel): no per-dash numpy
        return ends_xy
    for j in bent.tolist():
        ends_xy[j] = (ends_xy[j][:2] + points[inside_from[j]:inside_to[j]].ravel().tolist()
                      + ends_xy[j][2:])
    return ends_xy


def _stroke(draw: ImageDraw.ImageDraw, points: np.ndarray, pen: Pen, k: int) -> None:
    """Draw one polyline (shape ``(n, 2)``, supersampled pixels) with ``pen``."""
    width = _px(pen.width, k)
    pattern = DASHES[pen.dash]
    if pattern is None:
        draw.line(points.ravel().tolist(), fill=pen.colour, width=width, joint="curve")
        return
    for piece in dash_pieces(points, pattern[0] * width, pattern[1] * width):
        draw.line(piece, fill=pen.colour, width=width, joint="curve" if len(piece) > 4 else None)


def visible_runs(xs: np.ndarray, ys: np.ndarray, bounds: tuple[float, float, float, float]
                 ) -> list[np.ndarray]:
    """The parts of the polyline through ``(xs, ys)`` (shape ``(n,)`` each) inside
    ``bounds`` = (left, top, right, bottom), each of shape ``(m, 2)``.

    Segments are cut at the bounds (Liang and Barsky's parametric clipping, 1984); a point
    that is NaN or infinite breaks the line, as does leaving the bounds.
    """
    left, top, right, bottom = bounds
    if xs.size < 2:
        return []
    with np.errstate(invalid="ignore"):
        inside = (np.all(np.isfinite(xs)) and np.all(np.isfinite(ys))
                  and xs.min() >= left and xs.max() <= right
                  and ys.min() >= top and ys.max() <= bottom)
    if inside:
        return [np.column_stack([xs, ys])]
    x0, y0, dx, dy = xs[:-1], ys[:-1], np.diff(xs), np.diff(ys)
    visible = np.isfinite(x0) & np.isfinite(y0) & np.isfinite(dx) & np.isfinite(dy)
    enter, leave = np.zeros(dx.shape), np.ones(dx.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        for p, q in ((-dx, x0 - left), (dx, right - x0), (-dy, y0 - top), (dy, bottom - y0)):
            visible &= ~((p == 0.0) & (q < 0.0))
            ratio = q / p
            enter = np.where(p < 0.0, np.maximum(enter, ratio), enter)
            leave = np.where(p > 0.0, np.minimum(leave, ratio), leave)
        visible &= enter <= leave
    kept = np.flatnonzero(visible)
    if not kept.size:
        return []
    # consecutive kept segments join unless one was cut where they meet
    joined = (np.diff(kept) == 1) & (leave[kept[:-1]] >= 1.0) & (enter[kept[1:]] <= 0.0)
    runs = []
    for part in np.split(kept, np.flatnonzero(~joined) + 1):
        run = np.empty((part.size + 1, 2))
        first = part[0]
        run[0] = x0[first] + enter[first] * dx[first], y0[first] + enter[first] * dy[first]
        run[1:, 0] = x0[part] + leave[part] * dx[part]
        run[1:, 1] = y0[part] + leave[part] * dy[part]
        runs.append(run)
    return runs


def encode_png(pixels: np.ndarray, compress_level: int) -> bytes:
    """A PNG file of ``pixels`` (shape ``(height, width, 3)``, uint8 RGB): signature,
    IHDR, one IDAT of the "Up"-filtered rows deflated at zlib ``compress_level``, IEND."""
    height, width, channels = pixels.shape
    if channels != 3 or pixels.dtype != np.uint8:
        raise ValueError(f"encode_png takes uint8 RGB of shape (h, w, 3), got {pixels.dtype} "
                         f"{pixels.shape}")
    rows = pixels.reshape(height, width * 3)
    filtered = np.empty((height, 1 + width * 3), dtype=np.uint8)
    filtered[:, 0] = PNG_FILTER_UP
    filtered[0, 1:] = rows[0]  # the row above the first counts as zeros
    np.subtract(rows[1:], rows[:-1], out=filtered[1:, 1:])  # modulo 256, as the filter is

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data)))

    return (PNG_SIGNATURE
            + chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, *PNG_RGB_HEADER))
            + chunk(b"IDAT", zlib.compress(filtered.tobytes(), compress_level))
            + chunk(b"IEND", b""))


# ---------------------------------------------------------------------------------
# the sheet


class Sheet:
    """A white picture ``width`` x ``height`` pixels to draw plots on; see the module.

    Coordinates are final pixels (floats), origin at the top left, y downwards.
    """

    def __init__(self, width: int, height: int, supersample: int = SUPERSAMPLE):
        if width < 1 or height < 1 or supersample < 1:
            raise ValueError(f"a sheet needs a positive size and supersampling, got "
                             f"{width!r} x {height!r} at {supersample!r}")
        self.width, self.height, self.k = int(width), int(height), int(supersample)
        self._image = Image.new("RGB", (self.width * self.k, self.height * self.k), BACKGROUND)
        self._draw = ImageDraw.Draw(self._image)
        self._fonts: dict[float, ImageFont.FreeTypeFont] = {}
        self._panels: list[Panel] = []

    # -- layout

    def panel(self, left: float, top: float, right: float, bottom: float, x: Scale,
              y: Scale) -> Panel:
        """A panel over the rectangle ``(left, top)`` to ``(right, bottom)`` (pixels)
        with scales ``x`` and ``y``."""
        if not (0 <= left < right <= self.width and 0 <= top < bottom <= self.height):
            raise ValueError(f"panel ({left!r}, {top!r}, {right!r}, {bottom!r}) is not "
                             f"inside the {self.width} x {self.height} sheet")
        made = Panel(self, (left, top, right, bottom), x, y)
        self._panels.append(made)
        return made

    # -- text

    def _font(self, size: float) -> ImageFont.FreeTypeFont:
        """The built-in font at ``size`` final pixels (scaled by the supersampling), one
        object per sheet and size; laid out glyph by glyph (no shaping library: the same
        result on every machine)."""
        font = self._fonts.get(size)
        if font is None:
            font = ImageFont.load_default(size=size * self.k).font_variant(
                layout_engine=ImageFont.Layout.BASIC)
            self._fonts[size] = font
        return font

    def text_width(self, text: str, size: float = LABEL_SIZE_PX) -> float:
        """Width of ``text`` written at ``size``, in pixels."""
        return self._font(size).getlength(text.translate(GLYPH_STAND_INS)) / self.k

    def text(self, x: float, y: float, text: str, size: float = LABEL_SIZE_PX,
             colour: str = INK, anchor: str = "la", bold: bool = False,
             vertical: bool = False) -> None:
        """Write ``text`` at ``(x, y)`` pixels, ``size`` pixels high (the font's em).

        ``anchor``: Pillow's two letters, horizontal (l, m, r) then vertical (a ascender,
        m middle, s baseline, d descender); ``vertical`` text reads upwards and is centred
        on the point. ``bold``: thickened by a stroke of ``BOLD_STROKE_PX``.
        """
        k = self.k
        font = self._font(size)
        text = text.translate(GLYPH_STAND_INS)
        stroke = BOLD_STROKE_PX * k if bold else 0.0
        draw = self._canvas()
        if not vertical:
            draw.text((x * k, y * k), text, fill=colour, font=font, anchor=anchor,
                      stroke_width=stroke, stroke_fill=colour)
            return
        left, top, right, bottom = font.getbbox(text, anchor="lm", stroke_width=stroke)
        mask = Image.new("L", (math.ceil(right - left), math.ceil(bottom - top)), 0)
        ImageDraw.Draw(mask).text((-left, -top), text, fill=255, font=font, anchor="lm",
                                  stroke_width=stroke, stroke_fill=255)
        mask = mask.transpose(Image.Transpose.ROTATE_90)
        corner = (round(x * k - mask.width / 2.0), round(y * k - mask.height / 2.0))
        self._image.paste(colour, (*corner, corner[0] + mask.width, corner[1] + mask.height),
                          mask)

    # -- drawing outside the panels

    def line(self, xs, ys, pen: Pen) -> None:
        """A polyline through ``(xs, ys)`` pixels (shape ``(n,)`` each), not clipped."""
        k = self.k
        points = np.column_stack([np.asarray(xs, float), np.asarray(ys, float)]) * k - 0.5
        for run in visible_runs(points[:, 0], points[:, 1], (0, 0, *self._image.size)):
            _stroke(self._canvas(), run, pen, k)

    def _canvas(self) -> ImageDraw.ImageDraw:
        """The sheet's drawing surface, with every panel's clipped drawing pasted back."""
        for panel in self._panels:
            panel._paste()
        return self._draw

    # -- output

    def image(self) -> Image.Image:
        """The finished picture, ``width`` x ``height`` pixels (RGB)."""
        self._canvas()
        return self._image.reduce(self.k) if self.k > 1 else self._image.copy()

    def save(self, path: str | os.PathLike, compress_level: int) -> None:
        """Write the picture as PNG to ``path`` at zlib ``compress_level`` (0 to 9),
        through a temporary file renamed at the end (:func:`encode_png`: Pillow's own PNG
        writer would add 15 to 20 ms of imports to a render)."""
        data = encode_png(np.asarray(self.image()), compress_level)
        with atomic_path(path) as temp:
            temp.write_bytes(data)


# ---------------------------------------------------------------------------------
# panels


class Panel:
    """A rectangle of a :class:`Sheet` showing data on two :class:`Scale` s; made by
    :meth:`Sheet.panel`. Drawing methods take data values; grids, lines, markers, spans
    and bars are clipped to the rectangle."""

    def __init__(self, sheet: Sheet, box: tuple[float, float, float, float], x: Scale,
                 y: Scale):
        self.sheet, self.x, self.y = sheet, x, y
        self.left, self.top, self.right, self.bottom = box
        k = sheet.k
        self._box = tuple(round(edge * k) for edge in box)  # supersampled, on the sheet
        guard = round(CLIP_GUARD_PX * k)
        x0, y0, x1, y1 = self._box
        self._bands = [band for band in ((x0 - guard, y0 - guard, x1 + guard, y0),
                                         (x0 - guard, y1, x1 + guard, y1 + guard),
                                         (x0 - guard, y0, x0, y1), (x1, y0, x1 + guard, y1))]
        self._saved: list[Image.Image] | None = None
        self._ticks: dict[str, np.ndarray] = {}

    # -- coordinates

    def position(self, xs, ys) -> tuple[np.ndarray, np.ndarray]:
        """Where data ``(xs, ys)`` fall on the sheet, in final pixels (same shapes)."""
        x0, y0, x1, y1 = (edge / self.sheet.k for edge in self._box)
        return (x0 + self.x.fraction(xs) * (x1 - x0),
                y1 - self.y.fraction(ys) * (y1 - y0))

    def _sheet_px(self, xs, ys) -> tuple[np.ndarray, np.ndarray]:
        """Data to supersampled pixel coordinates on the sheet (Pillow draws a coordinate
        c over the pixel [c, c + 1): hence the half-pixel shift)."""
        x0, y0, x1, y1 = self._box
        return (x0 + self.x.fraction(xs) * (x1 - x0) - 0.5,
                y1 - self.y.fraction(ys) * (y1 - y0) - 0.5)

    def _edges(self, reach: float = 0.0) -> tuple[float, float, float, float]:
        """The panel's edges in the coordinates of :meth:`_sheet_px`, ``reach`` beyond."""
        x0, y0, x1, y1 = self._box
        return x0 - 0.5 - reach, y0 - 0.5 - reach, x1 - 0.5 + reach, y1 - 0.5 + reach

    def _clipped(self) -> ImageDraw.ImageDraw:
        """The sheet's drawing surface for clipped drawing: the bands round the panel are
        saved first, to be put back by :meth:`_paste`."""
        if self._saved is None:
            self.sheet._canvas()  # other panels put their bands back first
            self._saved = [self.sheet._image.crop(band) for band in self._bands]
        return self.sheet._draw

    def _paste(self) -> None:
        """Put back the bands round the panel (before anything is drawn outside it)."""
        if self._saved is not None:
            for band, saved in zip(self._bands, self._saved):
                self.sheet._image.paste(saved, band[:2])
            self._saved = None

    def ticks(self, axis: str) -> np.ndarray:
        """The tick values of ``axis`` ("x" or "y") for this panel's size (computed once)."""
        if axis not in self._ticks:
            if axis == "x":
                values = self.x.tick_values(self.right - self.left, X_TICK_SPACING_PX)
            elif axis == "y":
                values = self.y.tick_values(self.bottom - self.top, Y_TICK_SPACING_PX,
                                            Y_LOG_TICK_CLEARANCE_PX)
            else:
                raise ValueError(f"Unknown axis {axis!r}; choose from x, y")
            self._ticks[axis] = values
        return self._ticks[axis]

    # -- clipped drawing

    def grid(self, pen: Pen, x: bool = True, y: bool = True) -> None:
        """Lines across the panel at the ticks of ``x`` and/or ``y``."""
        if x:
            for value in self.ticks("x"):
                self.vline(value, pen)
        if y:
            for value in self.ticks("y"):
                self.hline(value, pen)

    def line(self, xs, ys, pen: Pen) -> None:
        """A polyline through data ``(xs, ys)`` (shape ``(n,)`` each); NaN breaks it."""
        if pen.width / 2.0 >= CLIP_GUARD_PX:
            raise ValueError(f"pen width {pen.width!r} px: a clipped line must be narrower "
                             f"than {2 * CLIP_GUARD_PX:g} px")
        px, py = self._sheet_px(xs, ys)
        draw = self._clipped()
        for run in visible_runs(np.asarray(px, float), np.asarray(py, float), self._edges()):
            _stroke(draw, run, pen, self.sheet.k)

    def hline(self, value: float, pen: Pen) -> None:
        """A line across the panel at y = ``value``, on the nearest pixel row."""
        _, (y,) = self._sheet_px([self.x.low], [value])
        self._straight(np.array([self._box[0], self._box[2]]) - 0.5, self._snap(y, 2), pen)

    def vline(self, value: float, pen: Pen) -> None:
        """A line up the panel at x = ``value``, on the nearest pixel column."""
        (x,), _ = self._sheet_px([value], [self.y.low])
        self._straight(self._snap(x, 1), np.array([self._box[1], self._box[3]]) - 0.5, pen)

    def _snap(self, at: float, axis: int) -> np.ndarray:
        """Both ends of a line along ``axis`` (1: x, 2: y) at ``at`` moved to the centre
        of its final pixel (sheet coordinates), shape ``(2,)``."""
        return np.full(2, _pixel_centre(at, self.sheet.k))

    def _straight(self, xs: np.ndarray, ys: np.ndarray, pen: Pen) -> None:
        """A straight line between two sheet points, cut at the panel."""
        for run in visible_runs(xs, ys, self._edges()):
            _stroke(self._clipped(), run, pen, self.sheet.k)

    def markers(self, xs, ys, marker: Marker, clip: bool = True) -> None:
        """``marker`` at each finite point ``(xs, ys)`` (shape ``(n,)`` each): with
        ``clip`` those inside the panel, cut at its edges; with ``clip=False`` all, whole
        (a mark on an axis line)."""
        if clip and marker.size / 2.0 + marker.width >= CLIP_GUARD_PX:
            raise ValueError(f"marker size {marker.size!r} px: a clipped marker must be "
                             f"smaller than {2 * CLIP_GUARD_PX:g} px")
        px, py = self._sheet_px(xs, ys)
        points = np.column_stack([np.ravel(px), np.ravel(py)])
        with np.errstate(invalid="ignore"):
            keep = np.all(np.isfinite(points), axis=1)
            if clip:
                left, top, right, bottom = self._edges()
                keep &= ((points[:, 0] >= left) & (points[:, 0] <= right)
                         & (points[:, 1] >= top) & (points[:, 1] <= bottom))
        draw = self._clipped() if clip else self.sheet._canvas()
        marker._draw(draw, points[keep], self.sheet.k)

    def _rectangle(self, x0: float, y0: float, x1: float, y1: float, colour: str,
                   edge: Pen | None = None) -> None:
        """A filled rectangle between two corners (sheet coordinates) cut at the panel."""
        left, top, right, bottom = self._edges()
        x0, x1 = max(min(x0, x1), left), min(max(x0, x1), right)
        y0, y1 = max(min(y0, y1), top), min(max(y0, y1), bottom)
        if x0 <= x1 and y0 <= y1:
            self._clipped().rectangle(
                (x0, y0, x1, y1), fill=colour, outline=None if edge is None else edge.colour,
                width=0 if edge is None else _px(edge.width, self.sheet.k))

    def vspan(self, low: float, high: float, colour: str) -> None:
        """Shade the panel's full height between x = ``low`` and x = ``high``."""
        (x0, x1), (y0, y1) = self._sheet_px([low, high], [self.y.low, self.y.high])
        self._rectangle(x0, y0, x1, y1, colour)

    def bars(self, edges, heights, colour: str, edge: Pen | None = None) -> None:
        """Bars from the base (0, or the low limit on a log y axis) up to ``heights``
        (shape ``(n,)``) between ``edges`` (shape ``(n + 1,)``); ``edge`` outlines each
        bar (white outlines part neighbours)."""
        edges, heights = np.asarray(edges, float), np.asarray(heights, float)
        if edges.shape != (heights.size + 1,):
            raise ValueError(f"bars need one more edge than heights, got {edges.shape} "
                             f"edges for {heights.shape} heights")
        base = self.y.low if self.y.log else 0.0
        xs, tops = self._sheet_px(edges, np.append(heights, base))
        bottom = tops[-1]
        outline = 0 if edge is None else 2 * _px(edge.width, self.sheet.k)
        for x0, x1, top in zip(xs[:-1], xs[1:], tops[:-1]):
            if np.isfinite(top):
                # a bar narrower than its two outlines is drawn without them (or it vanishes)
                self._rectangle(x0, top, x1, bottom, colour,
                                edge if abs(x1 - x0) > outline else None)

    # -- text and axes, drawn on the sheet

    def text(self, x: float, y: float, text: str, size: float = LABEL_SIZE_PX,
             colour: str = INK, anchor: str = "la") -> None:
        """Write ``text`` at data ``(x, y)`` (not clipped); see :meth:`Sheet.text`."""
        px, py = self.position(x, y)
        self.sheet.text(float(px), float(py), text, size, colour, anchor)

    def axes(self, x_title: str | None = None, y_title: str | None = None,
             x_labels: bool = True, size: float = LABEL_SIZE_PX) -> None:
        """The left and bottom axis lines with outward ticks, tick labels (none along x
        with ``x_labels=False``, for a panel above another sharing its x axis) and the
        axis titles (the y title written upwards left of the labels)."""
        sheet, k = self.sheet, self.sheet.k
        draw = sheet._canvas()
        pen = Pen(INK, AXIS_WIDTH_PX)
        # the axis lines on the pixels just outside the panel's left and bottom edges
        x0 = float(_pixel_centre(self._box[0] - 0.5 - k / 2.0, k))
        x1 = float(_pixel_centre(self._box[2] - 0.5 - k / 2.0, k))
        y0 = float(_pixel_centre(self._box[1] - 0.5, k))
        y1 = float(_pixel_centre(self._box[3] - 0.5 + k / 2.0, k))
        tick = TICK_LENGTH_PX * k
        _stroke(draw, np.array([[x0, y0], [x0, y1], [x1, y1]]), pen, k)
        xs, _ = self._sheet_px(self.ticks("x"), np.zeros(self.ticks("x").size))
        xs = _pixel_centre(xs, k)
        for x in xs:
            _stroke(draw, np.array([[x, y1], [x, y1 + tick]]), pen, k)
        _, ys = self._sheet_px(np.zeros(self.ticks("y").size), self.ticks("y"))
        ys = _pixel_centre(ys, k)
        for y in ys:
            _stroke(draw, np.array([[x0, y], [x0 - tick, y]]), pen, k)
        below = (y1 + tick) / k + LABEL_GAP_PX
        if x_labels:
            for x, label in zip(xs, self.x.tick_text(self.ticks("x"))):
                # a label at the sheet's edge is moved in to be read whole
                half = sheet.text_width(label, size) / 2.0
                sheet.text(min(max(x / k, half), sheet.width - half), below, label, size,
                           anchor="ma")
        if x_title:
            sheet.text((self.left + self.right) / 2.0, below + size + LABEL_GAP_PX, x_title,
                       size, anchor="ma")
        labels = self.y.tick_text(self.ticks("y"))
        beside = (x0 - tick) / k - LABEL_GAP_PX
        for y, label in zip(ys, labels):
            sheet.text(beside, y / k, label, size, anchor="rm")
        if y_title:
            widest = max((sheet.text_width(label, size) for label in labels), default=0.0)
            sheet.text(beside - widest - LABEL_GAP_PX - size / 2.0,
                       (self.top + self.bottom) / 2.0, y_title, size, vertical=True)

    def right_axis(self, ticks: Sequence[tuple[float, str]], title: str | None = None,
                   size: float = LABEL_SIZE_PX) -> None:
        """An axis line on the right with outward ticks at the y values of ``ticks``
        (``(value, label)`` each), their labels, and ``title`` written upwards beyond."""
        sheet, k = self.sheet, self.sheet.k
        draw = sheet._canvas()
        pen = Pen(INK, AXIS_WIDTH_PX)
        # the axis line on the pixels just outside the panel's right edge
        x1 = float(_pixel_centre(self._box[2] - 0.5 + k / 2.0, k))
        y0 = float(_pixel_centre(self._box[1] - 0.5, k))
        y1 = float(_pixel_centre(self._box[3] - 0.5 + k / 2.0, k))
        tick = TICK_LENGTH_PX * k
        _stroke(draw, np.array([[x1, y0], [x1, y1]]), pen, k)
        values = np.array([value for value, _ in ticks], dtype=np.float64)
        ys = _pixel_centre(self._sheet_px(np.zeros(values.size), values)[1], k)
        beside = (x1 + tick) / k + LABEL_GAP_PX
        for y, (_, label) in zip(ys, ticks):
            _stroke(draw, np.array([[x1, y], [x1 + tick, y]]), pen, k)
            sheet.text(beside, y / k, label, size, anchor="lm")
        if title:
            widest = max((sheet.text_width(label, size) for _, label in ticks), default=0.0)
            sheet.text(beside + widest + LABEL_GAP_PX + size / 2.0,
                       (self.top + self.bottom) / 2.0, title, size, vertical=True)

    def legend(self, entries: Sequence[tuple[str, Pen | Marker | Fill]],
               size: float = LEGEND_SIZE_PX) -> None:
        """One row of ``(label, sample)`` entries above the panel, ending at its right
        edge (never over the data); a sample is a :class:`Pen`, :class:`Marker` or
        :class:`Fill`."""
        sheet, k = self.sheet, self.sheet.k
        widths = [LEGEND_SAMPLE_PX + LABEL_GAP_PX + sheet.text_width(label, size)
                  for label, _ in entries]
        x = self.right - sum(widths) - LEGEND_SPACING_PX * (len(entries) - 1)
        middle = self.top - LEGEND_LIFT_PX - size / 2.0
        half = size / 3.0
        for (label, sample), width in zip(entries, widths):
            box = tuple(v * k for v in (x, middle - half, x + LEGEND_SAMPLE_PX, middle + half))
            sample._sample(sheet._canvas(), box, k)
            sheet.text(x + LEGEND_SAMPLE_PX + LABEL_GAP_PX, middle, label, size, anchor="lm")
            x += width + LEGEND_SPACING_PX
