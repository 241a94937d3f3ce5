"""Waveform and spectrum plots as PNG files.

Drawn with our own kit (:mod:`sim.canvas`, on Pillow) and written atomically. The look
is our own and deliberately plain: white background, light grid, left and bottom axis
lines, one colour per trace, labelled axes with units, a bold title at the top left.
Sizes are given in inches at ``DPI`` (100 pixels per inch).
"""

from __future__ import annotations

import os

import numpy as np

from sim.canvas import Pen, Scale, Sheet, mix, padded

#: Figure width in inches, and height per stacked trace plus fixed room for titles.
FIGURE_WIDTH_IN = 10.0
HEIGHT_PER_TRACE_IN = 1.8
HEIGHT_BASE_IN = 2.0
#: Resolution of the PNG (1000 pixels wide).
DPI = 100
#: Fixed margins (inches) around the panels: room for the tick labels and the axis label
#: on the left (about eight characters of ticks), the time axis below, the titles above
#: and, between stacked panels, a legend row.
MARGIN_LEFT_IN = 1.0
MARGIN_RIGHT_IN = 0.2
MARGIN_BOTTOM_IN = 0.6
MARGIN_TITLES_IN = 0.85
MARGIN_TITLE_IN = 0.45
PANEL_GAP_IN = 0.3
PANEL_GAP_LEGEND_IN = 0.45
#: Extra room above the first panel for its legend row, in inches.
LEGEND_ROW_IN = 0.15
#: Most points drawn per line.  Longer records are reduced to the minimum and
#: maximum of each bucket (keeping every peak visible); 4 points per pixel column
#: of a 1000-pixel plot is more than the eye can resolve.
MAX_PLOT_POINTS = 4000
#: Trace colours, cycled: dark, saturated, distinguishable in greyscale print.
TRACE_COLOURS = ("#1f4e79", "#8c2d04", "#2d6a2e", "#5b2a86", "#7a5c00", "#00606b")
#: Width of a trace, in pixels (1 point at 100 dpi: thin enough that the flips of a
#: square wave 2 pixels apart stay apart).
TRACE_WIDTH_PX = 1.4
#: The spectrum's line, a little thinner: its peaks are a pixel or two wide.
SPECTRUM_WIDTH_PX = 1.25
#: Grid lines: light grey, under a pixel wide, so they guide without competing.
GRID_PEN = Pen("#d0d0d0", 0.8)
#: Space above and below a waveform's extremes, as a fraction of its span: the peaks
#: stay clear of the panel's edges and the axis line. None before and after its times:
#: a waveform runs from edge to edge.
WAVEFORM_MARGIN = 0.08
TIME_MARGIN = 0.0
#: Text sizes in pixels (the em of the built-in font, which runs smaller than most):
#: a figure's title, the grey line under it, a spectrum's title (above its panel) and
#: the harmonic numbers.
TITLE_SIZE_PX = 20.0
SUBTITLE_SIZE_PX = 13.0
PANEL_TITLE_SIZE_PX = 17.0
HARMONIC_SIZE_PX = 12.0
#: Where a figure's title and subtitle start: left edge, top of the title, top of the
#: subtitle (pixels).
TITLE_LEFT_PX = 10.0
TITLE_TOP_PX = 10.0
SUBTITLE_TOP_PX = 42.0
#: Gap between a panel's own title's baseline and the panel, in pixels.
PANEL_TITLE_LIFT_PX = 9.0
#: Colour of the subtitle: dark grey, read after the title.
SUBTITLE_COLOUR = "#444444"
#: Harmonic markers on a spectrum: dashed, in the second trace colour at 60 % over white,
#: so they mark the frequencies without hiding the peaks.
HARMONIC_OPACITY = 0.6
HARMONIC_PEN = Pen(mix(TRACE_COLOURS[1], "white", 1.0 - HARMONIC_OPACITY), 1.0, "dashed")
#: Harmonics shown on a spectrum plot (the x axis ends half a harmonic beyond).
SPECTRUM_HARMONICS = 12
#: Lowest level shown on a spectrum plot, below its highest peak, in dB.
SPECTRUM_RANGE_DB = 120.0
#: Top of a spectrum's level axis above the highest peak, in dB, and where the harmonic
#: numbers hang from (1 dB below the top).
SPECTRUM_HEADROOM_DB = 10.0
HARMONIC_LABEL_DB = 9.0
#: Upper frequency of a spectrum plot with no fundamental given (top of hearing).
SPECTRUM_DEFAULT_TOP_HZ = 20000.0
#: zlib level of the PNG files: 1 (fastest) instead of the encoder's 6. Measured on a
#: spectrum plot: 25 ms went to compressing at 6; the files come out about 15 % larger,
#: still far below the WAV beside them.
PNG_COMPRESS_LEVEL = 1


def inches_px(inches: float) -> int:
    """``inches`` at ``DPI``, in whole pixels."""
    return round(inches * DPI)


def new_sheet(height_in: float, width_in: float = FIGURE_WIDTH_IN) -> Sheet:
    """A blank sheet ``width_in`` x ``height_in`` inches at ``DPI``."""
    return Sheet(inches_px(width_in), inches_px(height_in))


def panel_boxes(sheet: Sheet, top_in: float, count: int = 1, gap_in: float = 0.0,
                right_in: float = MARGIN_RIGHT_IN, ratios: tuple[float, ...] | None = None
                ) -> list[tuple[float, float, float, float]]:
    """Rectangles ``(left, top, right, bottom)`` in pixels of ``count`` panels stacked
    inside the fixed margins (``top_in`` above, ``gap_in`` between), of heights in
    proportion to ``ratios`` (equal by default)."""
    ratios = ratios or (1.0,) * count
    left, right = inches_px(MARGIN_LEFT_IN), sheet.width - inches_px(right_in)
    top, bottom = inches_px(top_in), sheet.height - inches_px(MARGIN_BOTTOM_IN)
    gap = gap_in * DPI
    unit = (bottom - top - gap * (count - 1)) / sum(ratios)
    boxes = []
    for ratio in ratios:
        boxes.append((left, top, right, top + ratio * unit))
        top += ratio * unit + gap
    return boxes


def titles(sheet: Sheet, title: str, subtitle: str | None = None) -> None:
    """A figure's bold title at the top left and the grey subtitle under it."""
    sheet.text(TITLE_LEFT_PX, TITLE_TOP_PX, title, TITLE_SIZE_PX, anchor="la", bold=True)
    if subtitle:
        sheet.text(TITLE_LEFT_PX, SUBTITLE_TOP_PX, subtitle, SUBTITLE_SIZE_PX,
                   colour=SUBTITLE_COLOUR, anchor="la")


def finite_range(*arrays: np.ndarray) -> tuple[float, float]:
    """Smallest and largest finite value of ``arrays`` (any shapes); (-1, 1) if none."""
    finite = [a[np.isfinite(a)] for a in (np.asarray(x, dtype=np.float64) for x in arrays)]
    finite = [a for a in finite if a.size]
    if not finite:
        return -1.0, 1.0
    return (float(min(a.min() for a in finite)), float(max(a.max() for a in finite)))


def save(sheet: Sheet, path: str | os.PathLike) -> None:
    """Write ``sheet`` to ``path`` as PNG at ``PNG_COMPRESS_LEVEL``, atomically."""
    sheet.save(path, PNG_COMPRESS_LEVEL)


def envelope(x: np.ndarray, y: np.ndarray, max_points: int = MAX_PLOT_POINTS,
             keep: str = "minmax") -> tuple[np.ndarray, np.ndarray]:
    """Reduce a line of shape ``(n,)`` to about ``max_points`` points for drawing.

    ``keep="minmax"`` keeps each bucket's minimum and maximum (in time order), so
    narrow spikes survive; ``keep="max"`` keeps only the maximum (for spectra).
    """
    n = y.size
    if n <= max_points:
        return x, y
    per_bucket = 2 if keep == "minmax" else 1
    size = int(np.ceil(n * per_bucket / max_points))
    buckets = n // size
    xb = x[:buckets * size].reshape(buckets, size)
    yb = y[:buckets * size].reshape(buckets, size)
    rows = np.arange(buckets)
    if keep == "max":
        pick = np.argmax(yb, axis=1)
        return xb[rows, pick], yb[rows, pick]
    lo, hi = np.argmin(yb, axis=1), np.argmax(yb, axis=1)
    first, second = np.minimum(lo, hi), np.maximum(lo, hi)
    xs = np.stack([xb[rows, first], xb[rows, second]], axis=1).ravel()
    ys = np.stack([yb[rows, first], yb[rows, second]], axis=1).ravel()
    return xs, ys


def waveform_plot(path: str | os.PathLike, times_s, traces: dict, title: str,
                  subtitle: str | None = None) -> None:
    """Stacked waveforms, one panel per trace, sharing a time axis in ms.

    ``times_s``: shape ``(n,)`` seconds; ``traces``: name -> volts of shape ``(n,)``.
    The figure is ``FIGURE_WIDTH_IN`` x (2 + 1.8 per trace) inches at ``DPI``.
    """
    if not traces:
        raise ValueError("waveform_plot needs at least one trace")
    stacked_plot(path, times_s, {
        name: [(volts, None, Pen(TRACE_COLOURS[i % len(TRACE_COLOURS)], TRACE_WIDTH_PX))]
        for i, (name, volts) in enumerate(traces.items())}, title, subtitle)


def stacked_plot(path: str | os.PathLike, times_s, panels: dict, title: str,
                 subtitle: str | None = None) -> None:
    """Stacked panels sharing a time axis in ms, one or more curves on each.

    ``times_s``: shape ``(n,)`` seconds; ``panels``: name -> list of ``(volts, label,
    pen)`` with volts of shape ``(n,)``, ``label`` a legend entry or None and ``pen`` a
    :class:`sim.canvas.Pen`. A panel with labels gets a legend above it (never over a
    trace). Sized as :func:`waveform_plot`.
    """
    t_ms = np.asarray(times_s, dtype=np.float64) * 1e3
    reduced = {}
    for name, curves in panels.items():
        reduced[name] = []
        for volts, label, pen in curves:
            v = np.asarray(volts, dtype=np.float64)
            if v.shape != t_ms.shape:
                raise ValueError(f"trace {name!r} has shape {v.shape}, times have {t_ms.shape}")
            reduced[name].append((*envelope(t_ms, v), label, pen))
    count = len(reduced)
    legends = any(label is not None for curves in reduced.values() for _, _, label, _ in curves)
    sheet = new_sheet(HEIGHT_BASE_IN + HEIGHT_PER_TRACE_IN * count)
    boxes = panel_boxes(sheet, MARGIN_TITLES_IN + (LEGEND_ROW_IN if legends else 0.0), count,
                        PANEL_GAP_LEGEND_IN if legends else PANEL_GAP_IN)
    time_axis = Scale(*padded(*finite_range(t_ms), TIME_MARGIN))
    for number, (box, (name, curves)) in enumerate(zip(boxes, reduced.items()), start=1):
        low, high = finite_range(*(ys for _, ys, _, _ in curves))
        panel = sheet.panel(*box, x=time_axis, y=Scale(*padded(low, high, WAVEFORM_MARGIN)))
        panel.grid(GRID_PEN)
        for xs, ys, _, pen in curves:
            panel.line(xs, ys, pen)
        last = number == count
        panel.axes(x_title="time (ms)" if last else None, y_title=f"{name} (V)", x_labels=last)
        entries = [(label, pen) for _, _, label, pen in curves if label is not None]
        if entries:
            panel.legend(entries)
    titles(sheet, title, subtitle)
    save(sheet, path)


def amplitude_spectrum(volts, rate_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Hann-windowed amplitude spectrum: ``(freqs_hz, level_db)``, both ``(n//2+1,)``.

    Levels are dB re 1 V peak, corrected for the window's coherent gain so a steady
    sine of amplitude ``A`` volts shows a peak near ``20 log10(A)``.  The mean is
    removed first.
    """
    x = np.asarray(volts, dtype=np.float64)
    window = np.hanning(x.size)
    spectrum = np.fft.rfft((x - np.mean(x)) * window)
    amplitude = 2.0 * np.abs(spectrum) / np.sum(window)
    with np.errstate(divide="ignore"):
        level = 20.0 * np.log10(amplitude)
    return np.fft.rfftfreq(x.size, 1.0 / rate_hz), level


def spectrum_plot(path: str | os.PathLike, volts, rate_hz: float,
                  fundamental_hz: float | None, title: str) -> None:
    """Magnitude spectrum in dB (Hann window) with harmonics marked and numbered.

    ``volts``: shape ``(n,)`` sampled at ``rate_hz``.  With ``fundamental_hz`` the
    axis spans ``SPECTRUM_HARMONICS`` harmonics and each harmonic below Nyquist
    gets a dashed marker labelled with its number; without it the axis goes up
    to ``SPECTRUM_DEFAULT_TOP_HZ`` (or Nyquist).
    """
    freqs, level = amplitude_spectrum(volts, rate_hz)
    nyquist = rate_hz / 2.0
    if fundamental_hz:
        top = min(nyquist, (SPECTRUM_HARMONICS + 0.5) * fundamental_hz)
    else:
        top = min(nyquist, SPECTRUM_DEFAULT_TOP_HZ)
    shown = freqs <= top
    xs, ys = envelope(freqs[shown], level[shown], keep="max")
    finite = ys[np.isfinite(ys)]
    peak = float(finite.max()) if finite.size else 0.0
    floor = peak - SPECTRUM_RANGE_DB
    sheet = new_sheet(HEIGHT_BASE_IN + 2.0 * HEIGHT_PER_TRACE_IN)
    (box,) = panel_boxes(sheet, MARGIN_TITLE_IN)
    panel = sheet.panel(*box, x=Scale(0.0, top), y=Scale(floor, peak + SPECTRUM_HEADROOM_DB))
    panel.grid(GRID_PEN)
    harmonics = []
    if fundamental_hz:
        harmonics = [h for h in range(1, SPECTRUM_HARMONICS + 1) if h * fundamental_hz <= top]
        title = f"{title}  (fundamental {fundamental_hz:.6g} Hz)"
    for h in harmonics:  # under the trace: the markers must not hide the peaks
        panel.vline(h * fundamental_hz, HARMONIC_PEN)
    panel.line(xs, np.maximum(np.nan_to_num(ys, neginf=floor), floor),
               Pen(TRACE_COLOURS[0], SPECTRUM_WIDTH_PX))
    panel.axes("frequency (Hz)", "level (dB re 1 V peak)")
    for h in harmonics:
        panel.text(h * fundamental_hz, peak + HARMONIC_LABEL_DB, str(h), HARMONIC_SIZE_PX,
                   colour=TRACE_COLOURS[1], anchor="ma")
    sheet.text(panel.left, panel.top - PANEL_TITLE_LIFT_PX, title, PANEL_TITLE_SIZE_PX,
               anchor="ls", bold=True)
    save(sheet, path)
