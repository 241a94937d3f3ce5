"""Waveform and spectrum plots as PNG files.

Figures are drawn with matplotlib's object interface on the Agg canvas (no pyplot,
no global backend switch, safe without a display) and written atomically.  The look
is our own and deliberately plain: white background, light grid, one colour per
trace, labelled axes with units.
"""

from __future__ import annotations

import os

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from sim.fileio import atomic_path

#: Figure width in inches, and height per stacked trace plus fixed room for titles.
FIGURE_WIDTH_IN = 10.0
HEIGHT_PER_TRACE_IN = 1.8
HEIGHT_BASE_IN = 2.0
#: Resolution of the PNG (1000 pixels wide).
DPI = 100
#: Fixed margins (inches) around the axes: room for the tick labels and the axis label
#: on the left (about eight characters of ticks), the time axis below, the titles above
#: and, between stacked panels, a legend row. Laid out once, so a figure is drawn once
#: (an automatic layout draws it twice: 40 % of a waveform plot's time, measured).
MARGIN_LEFT_IN = 1.0
MARGIN_RIGHT_IN = 0.2
MARGIN_BOTTOM_IN = 0.6
MARGIN_TITLES_IN = 0.85
MARGIN_TITLE_IN = 0.45
PANEL_GAP_IN = 0.3
PANEL_GAP_LEGEND_IN = 0.45
#: Most points drawn per line.  Longer records are reduced to the minimum and
#: maximum of each bucket (keeping every peak visible); 4 points per pixel column
#: of a 1000-pixel plot is more than the eye can resolve.
MAX_PLOT_POINTS = 4000
#: Trace colours, cycled: dark, saturated, distinguishable in greyscale print.
TRACE_COLOURS = ("#1f4e79", "#8c2d04", "#2d6a2e", "#5b2a86", "#7a5c00", "#00606b")
#: Harmonics shown on a spectrum plot (the x axis ends half a harmonic beyond).
SPECTRUM_HARMONICS = 12
#: Lowest level shown on a spectrum plot, below its highest peak, in dB.
SPECTRUM_RANGE_DB = 120.0
#: Upper frequency of a spectrum plot with no fundamental given (top of hearing).
SPECTRUM_DEFAULT_TOP_HZ = 20000.0


def _new_figure(height_in: float) -> Figure:
    fig = Figure(figsize=(FIGURE_WIDTH_IN, height_in), dpi=DPI, facecolor="white")
    FigureCanvasAgg(fig)
    return fig


def _margins(fig: Figure, top_in: float, panels: int = 1, gap_in: float = 0.0) -> None:
    """Place the axes inside the fixed margins (inches), ``gap_in`` between panels."""
    width, height = fig.get_figwidth(), fig.get_figheight()
    panel_in = (height - top_in - MARGIN_BOTTOM_IN - gap_in * (panels - 1)) / panels
    fig.subplots_adjust(left=MARGIN_LEFT_IN / width, right=1.0 - MARGIN_RIGHT_IN / width,
                        bottom=MARGIN_BOTTOM_IN / height, top=1.0 - top_in / height,
                        hspace=gap_in / panel_in)


#: zlib level of the PNG files: 1 (fastest) instead of the encoder's 6. Measured on a
#: spectrum plot: 25 ms of its 0.15 s went to compressing at 6; the files come out about
#: 15 % larger (60 to 70 kB), still far below the WAV beside them.
PNG_COMPRESS_LEVEL = 1


def _save(fig: Figure, path: str | os.PathLike) -> None:
    with atomic_path(path) as temp:
        fig.savefig(temp, format="png", dpi=DPI, facecolor="white",
                    pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL})


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
    """Stacked waveforms, one subplot per trace, sharing a time axis in ms.

    ``times_s``: shape ``(n,)`` seconds; ``traces``: name -> volts of shape ``(n,)``.
    The figure is ``FIGURE_WIDTH_IN`` x (2 + 1.8 per trace) inches at ``DPI``.
    """
    if not traces:
        raise ValueError("waveform_plot needs at least one trace")
    stacked_plot(path, times_s, {
        name: [(volts, None, {"color": TRACE_COLOURS[i % len(TRACE_COLOURS)], "linewidth": 1.0})]
        for i, (name, volts) in enumerate(traces.items())}, title, subtitle)


def stacked_plot(path: str | os.PathLike, times_s, panels: dict, title: str,
                 subtitle: str | None = None) -> None:
    """Stacked subplots sharing a time axis in ms, one or more curves on each.

    ``times_s``: shape ``(n,)`` seconds; ``panels``: name -> list of ``(volts, label,
    style)`` with volts of shape ``(n,)``, ``label`` a legend entry or None and
    ``style`` matplotlib line keywords. A panel with labels gets a legend above it
    (never over a trace). Sized as :func:`waveform_plot`.
    """
    t_ms = np.asarray(times_s, dtype=np.float64) * 1e3
    count = len(panels)
    fig = _new_figure(HEIGHT_BASE_IN + HEIGHT_PER_TRACE_IN * count)
    axes = fig.subplots(count, 1, sharex=True, squeeze=False)[:, 0]
    legends = False
    for ax, (name, curves) in zip(axes, panels.items()):
        for volts, label, style in curves:
            v = np.asarray(volts, dtype=np.float64)
            if v.shape != t_ms.shape:
                raise ValueError(f"trace {name!r} has shape {v.shape}, times have {t_ms.shape}")
            xs, ys = envelope(t_ms, v)
            ax.plot(xs, ys, label=label, **style)
        ax.set_ylabel(f"{name} (V)")
        ax.grid(True, color="#d0d0d0", linewidth=0.6)
        ax.margins(x=0.0, y=0.08)
        if any(label is not None for _, label, _ in curves):
            legends = True
            ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=8,
                      frameon=False, borderaxespad=0.1)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    axes[-1].set_xlabel("time (ms)")
    fig.suptitle(title, fontsize=13, fontweight="bold", x=0.01, ha="left")
    if subtitle:
        fig.text(0.01, 1.0 - 0.42 / fig.get_figheight(), subtitle, fontsize=9, color="#444444",
                 ha="left", va="top")
    _margins(fig, MARGIN_TITLES_IN + (0.15 if legends else 0.0), count,
             PANEL_GAP_LEGEND_IN if legends else PANEL_GAP_IN)
    _save(fig, path)


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
    fig = _new_figure(HEIGHT_BASE_IN + 2.0 * HEIGHT_PER_TRACE_IN)
    ax = fig.subplots()
    ax.plot(xs, np.maximum(np.nan_to_num(ys, neginf=floor), floor), color=TRACE_COLOURS[0],
            linewidth=0.9)
    ax.set_xlim(0.0, top)
    ax.set_ylim(floor, peak + 10.0)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("level (dB re 1 V peak)")
    ax.grid(True, color="#d0d0d0", linewidth=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    if fundamental_hz:
        for h in range(1, SPECTRUM_HARMONICS + 1):
            f = h * fundamental_hz
            if f > top:
                break
            ax.axvline(f, color=TRACE_COLOURS[1], linestyle="--", linewidth=0.7, alpha=0.6)
            ax.annotate(str(h), xy=(f, peak + 9.0), ha="center", va="top", fontsize=8,
                        color=TRACE_COLOURS[1])
        title = f"{title}  (fundamental {fundamental_hz:.6g} Hz)"
    ax.set_title(title, loc="left", fontsize=12, fontweight="bold")
    _margins(fig, MARGIN_TITLE_IN)
    _save(fig, path)
