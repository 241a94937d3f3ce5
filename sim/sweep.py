"""Stepped sweep of one parameter: ``halfrail sweep PATCH REF.param START:STOP:COUNT``.

:func:`sweep` renders the patch once per value (through :func:`sim.runner.run_jobs`, so
the steps run on local processes or a Dask cluster with the same results), reads the
pitch, level, distortion and battery current of each step, and writes into the output
folder:

- ``<patch>.sweep.json``: ``{"param", "probe", "points": [{"value", "freq_hz", "note",
  "cents", "rms", "thd_pct", "supply_ma"}], ...}`` (see :func:`sweep` for the rest);
- ``<patch>.sweep.csv``: the same table for a spreadsheet;
- ``<patch>.sweep.png``: pitch against the swept value with a note-name axis, and the
  battery current below it;
- ``<patch>.sweep.wav``: the steps in order, each the render's listening signal,
  separated by ``STEP_GAP_SECONDS`` of silence, all at the render's fixed full scale
  (or one common gain with ``normalize``), so the steps keep their relative loudness.

Values are spaced linearly from START to STOP, or geometrically with ``log=True``
(``--log``): equal ratios suit resistances and capacitances, whose effect on pitch
goes with their ratio. When the swept parameter is ``supply.volts`` the report adds
the pitch drift in cents per volt (least-squares slope), and with a battery capacity
an estimate of the battery's life.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sim import audio, plots
from sim.canvas import Marker, Pen, Scale, padded
from sim.errors import PatchError, UsageError
from sim.fileio import write_json, write_text
from sim.notes import A4_HZ, A4_NUMBER, CENTS_PER_SEMITONE, SEMITONES_PER_OCTAVE, note_name
from sim.render import RenderOptions, listen_label, numeric_param
from sim.runner import AUDIO_KEY, LOCAL, Job, probe_measures, run_jobs
from sim.units import format_quantity

#: Silence between steps in the sweep WAV, in seconds: long enough to hear each step
#: as a sound of its own, short enough that the steps still read as one sequence (a
#: quarter second is about the pause between two deliberate turns of a knob).
STEP_GAP_SECONDS = 0.25

#: Seconds kept of each step unless asked otherwise: half a second is long enough to
#: hear a step's pitch and timbre (and holds 50 periods of a 100 Hz drone for the
#: pitch measure), short enough that eleven steps play in under ten seconds.
STEP_SECONDS = 0.5

#: Fields of a RANGE: START:STOP:COUNT.
RANGE_FIELDS = 3

#: Fewest and most steps of a sweep: two give a slope; a thousand renders of a second
#: take hours on a laptop, so more is far more likely a typo than a wish.
MIN_POINTS = 2
MAX_POINTS = 1000

#: The parameter whose sweep reports pitch drift and battery figures.
SUPPLY_VOLTS = "supply.volts"

#: Cents per octave (definition of the cent).
CENTS_PER_OCTAVE = SEMITONES_PER_OCTAVE * CENTS_PER_SEMITONE

#: Peak level of the sweep WAV with ``normalize``: the render's own normalisation level.
NORMALIZE_PEAK_DBFS = audio.NORMALIZE_PEAK_DBFS

#: The plot's pitch axis reaches this many cents beyond the highest and lowest pitch, so
#: a flat sweep still spans more than a semitone and shows at least one note name.
PITCH_MARGIN_CENTS = 60.0

#: Most note names on the plot's right axis: every semitone while they fit, then only
#: the natural notes, then only C and F, then only C.
MAX_NOTE_TICKS = 14
NOTE_TICK_SETS = (range(12), (0, 2, 4, 5, 7, 9, 11), (0, 5), (0,))

#: A sweep of at most this many steps gets a tick at each swept value; longer ones
#: get evenly spaced ticks (a dozen labels still fit across the 10-inch plot).
MAX_VALUE_TICKS = 12

#: Height of the sweep plot in inches (two panels).
SWEEP_PLOT_HEIGHT_IN = 7.0

#: What a battery life estimate leaves out (printed with it and stored in the report).
BATTERY_CAVEAT = ("capacity divided by the mean current of the swept points: a battery's "
                  "rated capacity is measured at a light load and falls as the load current "
                  "rises, and the circuit may stop working before the battery is flat, so "
                  "treat this as an upper estimate")

#: Columns of the printed and saved table: (heading, point key).
TABLE_COLUMNS = (("value", "value"), ("pitch Hz", "freq_hz"), ("note", "note"),
                 ("cents", "cents"), ("level V rms", "rms"), ("THD %", "thd_pct"),
                 ("supply mA", "supply_ma"))


@dataclass(frozen=True)
class SweepRange:
    """Values from ``start`` to ``stop`` (SI units, both included), ``count`` of them,
    spaced linearly or, with ``log``, by equal ratios."""

    start: float
    stop: float
    count: int
    log: bool = False

    def values(self) -> np.ndarray:
        """The swept values, shape (count,); the ends are exactly start and stop."""
        if self.log:
            out = np.geomspace(self.start, self.stop, self.count)
        else:
            out = np.linspace(self.start, self.stop, self.count)
        out[0], out[-1] = self.start, self.stop
        return out


@dataclass
class Swept:
    """What a sweep produced: the report (as written to JSON), the files, the WAV samples."""

    report: dict
    paths: list[Path] = field(default_factory=list)
    samples: np.ndarray | None = None  # the sweep WAV, shape (n,), in [-1, 1]
    wall_seconds: float = 0.0


def sweep_param(patch, key: str):
    """The :class:`blocks._base.Param` that ``key`` (``"REF.param"``) names in ``patch``.

    Raises PatchError naming the file and the part when the part or parameter is
    unknown, or the parameter is not a number (a choice such as a pot's taper).
    """
    ref, dot, name = key.partition(".")
    if not dot or not ref or not name:
        display = patch._source.display if patch._source is not None else patch.path
        raise PatchError(f"sweep {key}: expected REF.param such as RV1.position or "
                         "supply.volts", file=display)
    return numeric_param(patch, ref, name, f"sweep {key}", "be swept")[2]


def parse_range(text: str, param, log: bool = False) -> SweepRange:
    """Read RANGE ``START:STOP:COUNT`` for ``param`` (``0:1:11``, ``47k:220k:8``).

    START and STOP are read like patch values (prefixes, codes, units) and must be
    valid values of ``param``; COUNT is a whole number from MIN_POINTS to MAX_POINTS.
    ``log`` spaces the values by equal ratios (both ends above zero). Raises
    UsageError with a one-line message.
    """
    from sim.patch import resolve_value

    shape = "START:STOP:COUNT such as 0:1:11 or 47k:220k:8"
    fields = [f.strip() for f in str(text).split(":")]
    if len(fields) != RANGE_FIELDS or not all(fields):
        raise UsageError(f"range {text!r}: expected {shape}")
    ends = []
    for raw in fields[:2]:
        try:
            ends.append(float(resolve_value(param, raw)))
        except ValueError as error:
            raise UsageError(f"range {text!r}: {error}") from error
    try:
        count = int(fields[2])
    except ValueError as error:
        raise UsageError(f"range {text!r}: COUNT {fields[2]!r} is not a whole number "
                         f"(expected {shape})") from error
    if not MIN_POINTS <= count <= MAX_POINTS:
        raise UsageError(f"range {text!r}: COUNT must be from {MIN_POINTS} to {MAX_POINTS}, "
                         f"got {count}")
    if ends[0] == ends[1]:
        raise UsageError(f"range {text!r}: START and STOP are the same value")
    if log and not (ends[0] > 0 and ends[1] > 0):
        raise UsageError(f"range {text!r}: --log spaces values by equal ratios, so both "
                         "ends must be above zero")
    return SweepRange(ends[0], ends[1], count, log)


def sweep_point(value: float, report: dict, probe: str | None) -> dict:
    """One row of the sweep: ``{"value", "freq_hz", "note", "cents", "rms", "thd_pct",
    "supply_ma"}`` from a render report, read at ``probe`` (None: the listening signal)."""
    m = probe_measures(report, probe)
    return {"value": float(value), "freq_hz": m["freq_hz"], "note": m["note"],
            "cents": m["cents"], "rms": m["rms"], "thd_pct": m["thd_pct"],
            "supply_ma": report["supply"]["mean_ma"]}


def drift_cents_per_volt(points: Sequence[dict]) -> dict:
    """Pitch drift of a supply sweep: the least-squares slope of pitch (cents) on volts.

    points: sweep points whose ``value`` is the supply in volts. Returns
    ``{"cents_per_volt", "points_used", "span_cents"}`` over the points with a steady
    pitch (``cents_per_volt`` None when fewer than two have one); ``span_cents`` is the
    pitch of the highest-voltage point relative to the lowest.
    """
    used = [(p["value"], p["freq_hz"]) for p in points if p["freq_hz"]]
    if len(used) < MIN_POINTS:
        return {"cents_per_volt": None, "points_used": len(used), "span_cents": None}
    volts = np.array([v for v, _ in used])
    cents = CENTS_PER_OCTAVE * np.log2(np.array([f for _, f in used]) / used[0][1])
    slope = float(np.polyfit(volts, cents, 1)[0])
    low, high = int(np.argmin(volts)), int(np.argmax(volts))
    return {"cents_per_volt": slope, "points_used": len(used),
            "span_cents": float(cents[high] - cents[low])}


def battery_life(points: Sequence[dict], capacity_mah: float) -> dict:
    """``{"capacity_mah", "mean_ma", "hours", "caveat"}``: capacity over the mean supply
    current of the points (see BATTERY_CAVEAT for what this leaves out)."""
    if not (capacity_mah > 0 and math.isfinite(capacity_mah)):
        raise UsageError(f"--battery-mah must be positive, got {capacity_mah!r}")
    mean_ma = float(np.mean([p["supply_ma"] for p in points]))
    hours = capacity_mah / mean_ma if mean_ma > 0 else None
    return {"capacity_mah": float(capacity_mah), "mean_ma": mean_ma, "hours": hours,
            "caveat": BATTERY_CAVEAT}


def step_warnings(key: str, unit: str, values: Sequence[float], reports: Sequence[dict]
                  ) -> list[str]:
    """The steps' own warnings, each once, prefixed with the first value that gave it
    (``at R3.value=47 kΩ: ...``). Warnings about a step's own WAV (its loudness, its
    clipping) are left out: the sweep's WAV gets its own."""
    out: list[str] = []
    for value, report in zip(values, reports):
        own_wav = {audio.first_play_warning(report["audio"])}
        for warning in report["warnings"]:
            if warning in own_wav or warning.startswith(audio.CLIPPED_PREFIX):
                continue
            if not any(w.endswith(f": {warning}") for w in out):
                out.append(f"at {key}={format_quantity(value, unit)}: {warning}")
    return out


def sequence_samples(volts_steps: Sequence[np.ndarray], opts: RenderOptions
                     ) -> tuple[np.ndarray, dict]:
    """The sweep WAV: each step's listening volts (shape (n_i,) at ``opts.rate_hz``)
    through :func:`sim.audio.to_wav_samples` at one common scale, ``STEP_GAP_SECONDS``
    of silence between steps. Returns ``(samples, info)`` with samples shape (n,)
    and info ``{"full_scale_volts", "gap_seconds", "clipped_samples", "rms_dbfs",
    "peak_dbfs"}``.

    The scale is ``opts.full_scale_volts``; with ``opts.normalize`` it is the one that
    puts the loudest step's peak at NORMALIZE_PEAK_DBFS, the same for every step.
    """
    full_scale = opts.full_scale_volts
    if opts.normalize:
        peak = max((float(np.max(np.abs(audio.remove_dc(np.asarray(v), opts.rate_hz))))
                    for v in volts_steps if len(v)), default=0.0)
        if peak > 0.0:
            full_scale = peak / 10.0 ** (NORMALIZE_PEAK_DBFS / 20.0)
    gap = np.zeros(int(round(STEP_GAP_SECONDS * opts.rate_hz)))
    parts, clipped = [], 0
    for i, volts in enumerate(volts_steps):
        samples, info = audio.to_wav_samples(np.asarray(volts), full_scale_volts=full_scale,
                                             rate_hz=opts.rate_hz)
        clipped += info["clipped_samples"]
        parts += [gap, samples] if i else [samples]
    out = np.concatenate(parts) if parts else np.zeros(0)
    sounding = np.concatenate([p for p in parts if p is not gap]) if parts else out
    rms = float(np.sqrt(np.mean(sounding ** 2))) if sounding.size else 0.0
    peak = float(np.max(np.abs(out))) if out.size else 0.0
    return out, {"full_scale_volts": full_scale, "gap_seconds": STEP_GAP_SECONDS,
                 "clipped_samples": clipped,
                 "rms_dbfs": 20.0 * math.log10(rms) if rms > 0 else None,
                 "peak_dbfs": 20.0 * math.log10(peak) if peak > 0 else None}


def sweep(patch_path: str | os.PathLike, key: str, range_text: str,
          out_dir: str | os.PathLike = "renders", opts: RenderOptions | None = None, *,
          overrides: Sequence[str] = (), probe: str | None = None, log: bool = False,
          workers: int | None = None, executor: str = LOCAL,
          battery_mah: float | None = None, progress: bool = True,
          write: bool = True) -> Swept:
    """Render ``patch_path`` at each value of ``key`` over RANGE ``range_text``.

    overrides: ``"REF.param=value"`` applied first (``--set``); the swept value comes
    on top. opts: render options of every step (default: RenderOptions's, with
    STEP_SECONDS kept). probe: a probed net to measure (default: the listening signal). log:
    equal-ratio spacing. workers, executor: see :func:`sim.runner.run_jobs`.
    battery_mah: battery capacity for a life estimate. With ``write=False`` nothing is
    written.

    The report: ``{"param", "unit", "probe", "range": {"start", "stop", "count",
    "spacing"}, "points": [POINT], "seconds", "settle_seconds", "overrides",
    "warnings", "audio"}`` (POINT: :func:`sweep_point`), plus ``"drift"``
    (:func:`drift_cents_per_volt`) when ``key`` is ``supply.volts`` and ``"battery"``
    (:func:`battery_life`) with ``battery_mah``. Raises PatchError / UsageError on bad
    input before anything is rendered, JobError when a step fails.
    """
    from sim.patch import load_patch

    opts = opts or RenderOptions(seconds=STEP_SECONDS)
    opts.check()
    if battery_mah is not None:
        battery_life([{"supply_ma": 1.0}], battery_mah)  # checks the figure up front
    patch = load_patch(patch_path, overrides)
    param = sweep_param(patch, key)
    span = parse_range(range_text, param, log)
    probed = probe
    if probe is not None and probe not in patch.probes:
        if patch.listen.nets == (probe,):
            probed = None
        else:
            raise UsageError(f"--probe {probe}: not a probe of {patch.name} (probes: "
                             f"{', '.join(patch.probes) or 'none'}); add it to probes: in "
                             "the patch")
    values = [float(v) for v in span.values()]
    jobs = [Job(os.fspath(patch_path), (*overrides, f"{key}={value!r}"), opts) for value in values]
    started = time.perf_counter()
    reports = run_jobs(jobs, workers=workers, executor=executor, progress=progress,
                       label=f"sweep {key}", keep_audio=True)
    wall = time.perf_counter() - started
    points = [sweep_point(v, r, probed) for v, r in zip(values, reports)]
    samples, wav_info = sequence_samples([r[AUDIO_KEY] for r in reports], opts)
    warnings = step_warnings(key, param.unit, values, reports)
    warnings.extend(audio.level_warnings(wav_info, wav_info["full_scale_volts"],
                                         wav="the sweep WAV", source="a step"))
    report = {
        "param": key,
        "unit": param.unit,
        "probe": probe if probe is not None else listen_label(patch),
        "range": {"start": span.start, "stop": span.stop, "count": span.count,
                  "spacing": "log" if span.log else "linear"},
        "points": points,
        "seconds": opts.seconds,
        "settle_seconds": opts.settle,
        "overrides": list(overrides),
        "warnings": warnings,
        "audio": wav_info,
    }
    if key == SUPPLY_VOLTS:
        report["drift"] = drift_cents_per_volt(points)
    if battery_mah is not None:
        report["battery"] = battery_life(points, battery_mah)
    result = Swept(report=report, samples=samples, wall_seconds=wall)
    if not write:
        return result
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    base = out / f"{patch.name}.sweep"
    wav = Path(f"{base}.wav")
    audio.write_wav(wav, samples, opts.rate_hz)
    png = Path(f"{base}.png")
    sweep_plot(png, report, title=f"{patch.name}: pitch at {report['probe']} against {key}")
    csv = write_text(f"{base}.csv", table_csv(report))
    js = write_json(f"{base}.json", report)
    result.paths = [wav, png, csv, js]
    return result


# ---------------------------------------------------------------------------------
# the table


def _cell(key: str, value, unit: str) -> str:
    if value is None:
        return "-"
    if key == "value":
        return format_quantity(value, unit) if unit else f"{value:.4g}"
    if key == "note":
        return str(value)
    if key == "cents":
        return f"{value:+.1f}"
    if key == "freq_hz":
        return f"{value:.2f}"
    return f"{value:.3g}" if key == "thd_pct" else f"{value:.3f}"


def table_lines(report: dict) -> list[str]:
    """The sweep as aligned text lines: a heading, then one line per point."""
    rows = [[heading for heading, _ in TABLE_COLUMNS]]
    rows += [[_cell(k, p[k], report["unit"]) for _, k in TABLE_COLUMNS] for p in report["points"]]
    widths = [max(len(row[i]) for row in rows) for i in range(len(TABLE_COLUMNS))]
    return ["  ".join(cell.rjust(width) for cell, width in zip(row, widths)) for row in rows]


def table_csv(report: dict) -> str:
    """The sweep points as CSV text (SI values, empty cells where there is no pitch)."""
    keys = [k for _, k in TABLE_COLUMNS]
    lines = [",".join([report["param"], *keys[1:]])]
    for p in report["points"]:
        lines.append(",".join("" if p[k] is None else (str(p[k]) if isinstance(p[k], str)
                                                        else repr(float(p[k]))) for k in keys))
    return "\n".join(lines) + "\n"


def summary_lines(report: dict) -> list[str]:
    """Drift and battery lines for the console (empty when the report has neither)."""
    out = []
    drift = report.get("drift")
    if drift is not None:
        if drift["cents_per_volt"] is None:
            out.append("pitch drift: fewer than two points with a steady pitch")
        else:
            out.append(f"pitch drift: {drift['cents_per_volt']:+.2f} cents per volt "
                       f"({drift['span_cents']:+.1f} cents from the lowest to the highest "
                       f"supply, {drift['points_used']} points)")
    battery = report.get("battery")
    if battery is not None and battery["hours"] is not None:
        out.append(f"battery: {battery['capacity_mah']:g} mAh / {battery['mean_ma']:.2f} mA "
                   f"= about {battery['hours']:.0f} h ({battery['caveat']})")
    return out


# ---------------------------------------------------------------------------------
# the plot


def note_ticks(low_hz: float, high_hz: float) -> list[tuple[float, str]]:
    """Equal-tempered notes between ``low_hz`` and ``high_hz`` as ``(hz, name)``, thinned
    to at most MAX_NOTE_TICKS (every semitone, then naturals, then C and F, then C)."""
    first = math.ceil(A4_NUMBER + SEMITONES_PER_OCTAVE * math.log2(low_hz / A4_HZ))
    last = math.floor(A4_NUMBER + SEMITONES_PER_OCTAVE * math.log2(high_hz / A4_HZ))
    numbers = range(first, last + 1)
    for kept in NOTE_TICK_SETS:
        picked = [n for n in numbers if n % SEMITONES_PER_OCTAVE in kept]
        if len(picked) <= MAX_NOTE_TICKS:
            break
    return [(A4_HZ * 2.0 ** ((n - A4_NUMBER) / SEMITONES_PER_OCTAVE), note_name(n))
            for n in picked]


#: The sweep plot's panels: pitch above current, 3 to 1 in height, 0.2 inch apart;
#: 0.75 inch on the right for the note names and their title.
SWEEP_PANEL_RATIOS = (3.0, 1.0)
SWEEP_PANEL_GAP_IN = 0.2
SWEEP_MARGIN_RIGHT_IN = 0.75
#: Space beyond the swept values and the currents, as a fraction of their span (of its
#: logarithm on a log axis): the first and last markers stay clear of the axis lines.
SWEEP_MARGIN = 0.05
#: Pitch axis of a sweep in which no step has a steady pitch: an octave either side of
#: A4 (440 Hz, ISO 16), a musical range for the empty axis.
NO_PITCH_AXIS_HZ = (220.0, 880.0)
#: Lines and markers: 1.7-pixel lines (a sweep has few points, a bolder line reads
#: better), filled circles at the steps, grey lines at the notes under the data.
SWEEP_LINE_WIDTH_PX = 1.7
PITCH_MARKER_PX = 5.6
CURRENT_MARKER_PX = 4.2
NOTE_LINE_PEN = Pen("#e4e4e4", 0.8)
#: Steps without a steady pitch: a dark red x on the bottom of the pitch panel.
NO_PITCH_COLOUR = "#a00000"
NO_PITCH_MARKER_PX = 8.0


def sweep_plot(path: str | os.PathLike, report: dict, title: str) -> None:
    """Pitch (Hz, log axis, note names on the right) and supply current (mA) against the
    swept value; steps without a steady pitch are marked along the bottom."""
    points = report["points"]
    unit = report["unit"]
    x = np.array([p["value"] for p in points], dtype=np.float64)
    freq = np.array([p["freq_hz"] if p["freq_hz"] else np.nan for p in points])
    supply = np.array([p["supply_ma"] for p in points], dtype=np.float64)
    log_x = report["range"]["spacing"] == "log"
    sheet = plots.new_sheet(SWEEP_PLOT_HEIGHT_IN)
    top_box, bottom_box = plots.panel_boxes(
        sheet, plots.MARGIN_TITLES_IN + plots.LEGEND_ROW_IN, 2, SWEEP_PANEL_GAP_IN,
        right_in=SWEEP_MARGIN_RIGHT_IN, ratios=SWEEP_PANEL_RATIOS)
    x_axis = Scale(*padded(*plots.finite_range(x), SWEEP_MARGIN, log=log_x), log=log_x,
                   ticks=x if len(x) <= MAX_VALUE_TICKS else None,
                   format=(lambda v: format_quantity(v, unit)) if unit else (lambda v: f"{v:.4g}"))
    pitched = np.isfinite(freq)
    low, high = NO_PITCH_AXIS_HZ
    if np.any(pitched):
        margin = 2.0 ** (PITCH_MARGIN_CENTS / CENTS_PER_OCTAVE)
        low, high = np.nanmin(freq) / margin, np.nanmax(freq) * margin
    top = sheet.panel(*top_box, x=x_axis, y=Scale(low, high, log=True, format=lambda v: f"{v:g}"))
    colour, current_colour = plots.TRACE_COLOURS[0], plots.TRACE_COLOURS[1]
    notes = note_ticks(low, high)
    for hz, _ in notes:
        top.hline(hz, NOTE_LINE_PEN)
    top.grid(plots.GRID_PEN, y=False)
    if np.any(pitched):
        top.line(x, freq, Pen(colour, SWEEP_LINE_WIDTH_PX))
        top.markers(x, freq, Marker(colour, size=PITCH_MARKER_PX))
    top.axes(y_title=f"pitch at {report['probe']} (Hz)", x_labels=False)
    top.right_axis(notes, "note")
    if not np.all(pitched):
        unpitched = Marker(NO_PITCH_COLOUR, "x", NO_PITCH_MARKER_PX)
        top.markers(x[~pitched], np.full(int(np.sum(~pitched)), low), unpitched, clip=False)
        top.legend([("no steady pitch", unpitched)])
    bottom = sheet.panel(*bottom_box, x=x_axis,
                         y=Scale(*padded(*plots.finite_range(supply), SWEEP_MARGIN)))
    bottom.grid(plots.GRID_PEN)
    bottom.line(x, supply, Pen(current_colour, SWEEP_LINE_WIDTH_PX))
    bottom.markers(x, supply, Marker(current_colour, size=CURRENT_MARKER_PX))
    bottom.axes(report["param"], "supply (mA)")
    subtitle = [f"{report['seconds']:g} s per step after {report['settle_seconds']:g} s settling"]
    subtitle += summary_lines({k: v for k, v in report.items() if k == "drift"})
    plots.titles(sheet, title, "; ".join(subtitle))
    plots.save(sheet, path)
