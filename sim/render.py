"""Render a patch: simulate from power-on, then write the WAV, the plots and the report.

:func:`render` is the library entry point behind ``halfrail render``; the CLI only
parses options into :class:`RenderOptions` and prints the paths this returns.
"""

from __future__ import annotations

import copy
import math
import os
import queue
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import blocks
from sim import audio, kernel, measure
from sim.compile import Circuit, compile_patch
from sim.errors import PatchError, UsageError
from sim.fileio import write_json
from sim.simulate import Automation, StepOptions, simulate, simulate_reference
from sim.trace import DenseTrace, GridReader, StepTrace
from sim.units import format_quantity

#: Samples per audio sample in the simulated signal before the anti-alias filter and
#: decimation. 4 x 48 kHz = 192 kHz puts the first alias of a square's harmonics far
#: above the filter's stop band.
OVERSAMPLE = 4

#: Oversampling of the WAV's own path: the listening signal is read as interval averages
#: at AUDIO_OVERSAMPLE x the audio rate, then low-passed and decimated. Measured on the
#: oscillator's square output (energy between the harmonics over the total, WAV at
#: 48 kHz): 4x gives -61 dB, 8x -73 dB, 16x -85 dB (12 dB per doubling).
AUDIO_OVERSAMPLE = 16

#: The WAV path is computed in chunks of this many seconds (bounded memory for long
#: renders), each read with a margin of the anti-alias filter's length on both sides.
AUDIO_CHUNK_SECONDS = 1.0

#: Full-scale voltage of renders: a WAV sample of 1.0 is this many volts at the
#: listening point. Fixed so variants keep their relative loudness; a 9 V square
#: (+-4.5 V after DC removal) lands near -7 dBFS.
FULL_SCALE_VOLTS = 10.0

#: Threads a render runs beside its own. While the simulation runs, one imports what the
#: rest of the render needs (plots, audio files) and loads its compiled readers,
#: then, for a slow simulation, reads the finished part of the trace
#: (STREAM_DURING_SIMULATION: the report's signals, the gates' output currents, the WAV
#: path). After the simulation the rest of that reading, the WAV samples and the
#: spectrum plot run in these threads while this one measures the signals and draws the
#: waveforms. Two match a 2-core machine: the compiled readers release the GIL, so they
#: use the second core. Each result is a function of the trace alone and is gathered in
#: a fixed order, so the outputs are the same to the bit whatever the timing.
RENDER_THREADS = 2

#: Read the trace while it is computed (:class:`_TraceStream`): the gates' output
#: currents and their peaks, the report's signals and the WAV path's reads and
#: decimation run in a pool thread beside the simulation, on its finished part. Off
#: (False), they run after it, in both pool threads and this one; the outputs are the
#: same to the bit either way. "auto" reads beside the simulation only when the stepper
#: is slower than the readers (STREAM_ABOVE_SECONDS_PER_SECOND).
STREAM_DURING_SIMULATION = "auto"

#: With STREAM_DURING_SIMULATION "auto", the trace is read beside the simulation when a
#: chunk run after the render's imports took more than this many wall seconds per
#: simulated second. Set when the readers took about 0.1 s per second of audio on one
#: core, from whole 10 s renders, reading beside the simulation against after it:
#: tri-square (the stepper at 0.06 to 0.07 s per second) 3.32 s against 2.94 s; the
#: mixer (0.17 to 0.23) 4.62 against 4.87 s; step-down (0.3 to 0.37) 6.6 against 7.7 s.
#: The readers now take about 0.04 s per second of audio; reading beside the
#: tri-square's simulation always was still 5 % slower than this rule (8 interleaved
#: rounds).
STREAM_ABOVE_SECONDS_PER_SECOND = 0.12

#: The simulation hands its finished points to that thread in batches of at least this
#: many simulated seconds (one chunk of StepOptions.chunk_seconds): few, large compiled
#: calls that release the GIL, rather than many short Python round trips competing with
#: the simulation's own thread for the GIL; the last batch, read after the simulation,
#: is a few tens of ms of work.
STREAM_BATCH_SECONDS = 0.25

#: Simulated seconds above which a progress bar is shown.
PROGRESS_ABOVE_SECONDS = 3.0

#: The waveform plot shows this many periods of the listening signal (at least
#: PLOT_MIN_SECONDS), so it reads like a scope screen; with no steady pitch it shows
#: PLOT_NO_PITCH_SECONDS.
PLOT_PERIODS = 4
PLOT_MIN_SECONDS = 0.02
PLOT_NO_PITCH_SECONDS = 0.05

#: source: from memory, JEDEC JESD13-B (B-series CMOS): recommended operating range up to
#: 15 V (3 V minimum for the guaranteed figures) and 18 V absolute maximum DC supply.
SUPPLY_RECOMMENDED_MAX_VOLTS = 15.0
SUPPLY_ABSOLUTE_MAX_VOLTS = 18.0
SUPPLY_MIN_VOLTS = 3.0

#: Kinds whose current ``listen: REF`` plays, and the parameter (ohms) that turns that
#: current into the WAV's volts: a speaker's coil current times its coil resistance, the
#: volts a resistor of the speaker's ohms would show. So the fixed full scale applies as
#: for a net, and the levels of two renders through the same speaker compare as the
#: square roots of their powers.
def speaker_kinds() -> tuple[str, ...]:
    """Kinds that are loudspeakers (``Kind.sound_ohms`` set): listened to by their current."""
    return tuple(name for name, kind in blocks.REGISTRY.items() if kind.sound_ohms)

#: A speaker whose mean current is more than this fraction of its RMS current (DC
#: included) is flagged: the DC pushes the cone off centre and heats the coil without
#: making sound. A tenth allows the small offset of a bridged pair whose two outputs are
#: not quite symmetric, and catches a speaker hung from one output to a rail (about 0.7).
SPEAKER_DC_FRACTION = 0.1

#: source: JEDEC JESD13-B (B-series CMOS), minimum output drive at VDD = 10 V: 1.3 mA
#: sunk with the output at 0.5 V, and sourced with it at 9.5 V (the figures
#: tests/test_blocks.py checks the inverter against).
GUARANTEED_DRIVE_VDD = 10.0
GUARANTEED_DRIVE_DROP_VOLTS = 0.5
GUARANTEED_DRIVE_AMPS = 1.3e-3

SOLVERS = ("compiled", "reference")

#: Tolerances of ``--quality`` (rtol of the compiled stepper; atol is a tenth of it in volts).
QUALITIES = {"draft": 1e-3, "default": StepOptions.rtol, "fine": 1e-5}

#: Window lengths of the pitch track of a moving render, shortest first (s). A window
#: must hold a few periods (sim.measure.MIN_PERIODS) yet see little drift within it
#: (sim.measure.DRIFT_LIMIT_CENTS between its thirds): 5 ms suits a fast move of a
#: high pitch (four periods at 800 Hz), 80 ms a slow move of a low one (three periods
#: at 40 Hz). At each point of the track the window that last worked is tried first,
#: then the others nearest to it.
MOVE_TRACK_WINDOWS_SECONDS = (0.005, 0.01, 0.02, 0.04, 0.08)

#: Spacing of the points of that track (s): a hundred a second follows any knob a hand
#: can turn.
MOVE_TRACK_HOP_SECONDS = 0.01


@dataclass(frozen=True)
class Move:
    """A parameter turned linearly over the kept part of a render (``--move``).

    ``start`` and ``stop`` are the values as written (``"0"``, ``"10k"``); the
    parameter holds ``start`` from power-on to the end of ``settle``, moves linearly
    to ``stop`` over the kept seconds, and ends there.
    """

    ref: str
    param: str
    start: str
    stop: str

    @property
    def key(self) -> str:
        return f"{self.ref}.{self.param}"

    def __str__(self) -> str:
        return f"{self.key}={self.start}:{self.stop}"


def parse_move(text: str) -> Move:
    """Read ``"REF.param=START:STOP"`` (``RV1.position=0:1``); UsageError when malformed."""
    from sim.patch import parse_override

    shape = "REF.param=START:STOP such as RV1.position=0:1 or supply.volts=9:6"
    try:
        ref, param, raw = parse_override(text)
    except ValueError as error:
        raise UsageError(f"--move {text}: expected {shape}") from error
    start, colon, stop = raw.partition(":")
    if not colon or not start.strip() or not stop.strip() or ":" in stop:
        raise UsageError(f"--move {text}: expected {shape}")
    return Move(ref, param, start.strip(), stop.strip())


@dataclass
class RenderOptions:
    """Options of one render (defaults are the CLI's defaults)."""

    seconds: float = 1.0
    settle: float = 0.2
    rate_hz: int = 48000
    full_scale_volts: float = FULL_SCALE_VOLTS
    normalize: bool = False
    solver: str = "compiled"
    quality: str = "default"
    progress: bool = True
    moves: tuple[Move, ...] = ()  # parameters turned during the kept seconds (--move)
    # Compute the WAV path (16x oversampled listening signal, levels, clipping). Batches
    # that only measure (spread, tune) turn it off: it is a third of a render's time.
    wav: bool = True

    def check(self) -> None:
        if not (self.seconds > 0 and math.isfinite(self.seconds)):
            raise UsageError(f"--seconds must be positive, got {self.seconds!r}")
        if not (self.settle >= 0 and math.isfinite(self.settle)):
            raise UsageError(f"--settle must be zero or positive, got {self.settle!r}")
        if not 8000 <= self.rate_hz <= 192000:
            raise UsageError(f"--rate must be between 8000 and 192000 Hz, got {self.rate_hz!r}")
        if self.solver not in SOLVERS:
            raise UsageError(f"Unknown solver {self.solver!r} (choices: {', '.join(SOLVERS)})")
        if self.quality not in QUALITIES:
            raise UsageError(f"Unknown quality {self.quality!r} (choices: {', '.join(QUALITIES)})")
        if not self.full_scale_volts > 0:
            raise UsageError(f"--full-scale must be positive, got {self.full_scale_volts!r}")
        keys = [move.key for move in self.moves]
        if len(set(keys)) != len(keys):
            raise UsageError(f"--move names a parameter twice ({', '.join(keys)}): give each once")

    def step_options(self) -> StepOptions:
        rtol = QUALITIES[self.quality]
        return StepOptions(rtol=rtol, atol_volts=rtol / 10.0, sample_seconds=1.0 / self.rate_hz)


@dataclass
class Rendered:
    """What a render produced: the report (as written to JSON) and the files."""

    report: dict
    paths: list[Path] = field(default_factory=list)
    times: np.ndarray | None = None
    # name -> (m,) on the grid of ``times``: the names of report_signal_names, and gnd
    signals: dict[str, np.ndarray] = field(default_factory=dict)
    listen: np.ndarray | None = None
    sample_rate_hz: float = 0.0
    audio_volts: np.ndarray | None = None  # the listening signal at the WAV's rate, (k,)


def supply_warnings(volts: float) -> list[str]:
    """Cautions about the supply voltage against the B-series ratings."""
    out = []
    if volts > SUPPLY_ABSOLUTE_MAX_VOLTS:
        out.append(f"supply {volts:g} V is above the {SUPPLY_ABSOLUTE_MAX_VOLTS:g} V absolute maximum "
                   "of B-series CMOS (JESD13-B): a real chip would be damaged")
    elif volts > SUPPLY_RECOMMENDED_MAX_VOLTS:
        out.append(f"supply {volts:g} V is above the {SUPPLY_RECOMMENDED_MAX_VOLTS:g} V recommended "
                   "maximum of B-series CMOS (JESD13-B)")
    if volts < SUPPLY_MIN_VOLTS:
        out.append(f"supply {volts:g} V is below {SUPPLY_MIN_VOLTS:g} V, where B-series parts are "
                   "not characterised and this model is a rough guess")
    return out


def listened_current(patch) -> tuple[str, float] | None:
    """For ``listen: REF``: the recorded unknown (``"SP1.current"``) and the ohms that scale it.

    None when the patch listens to a net or a pair of nets. Raises PatchError naming the
    file, line and part when the part's kind has no current to play (only a kind that
    declares ``sound_ohms`` has).
    """
    ref = patch.listen.part
    if ref is None:
        return None
    part = patch.parts[ref]
    kind = blocks.REGISTRY[part.kind]
    if not kind.sound_ohms:
        raise PatchError(f"listen: {ref} is a {part.kind}; the current of a "
                         f"{' or '.join(speaker_kinds())} can be listened to, not of a "
                         f"{part.kind}: listen to a net, [plus, minus], or the speaker it drives",
                         file=patch.path, line=patch.listen.line, part=ref)
    return f"{ref}.{kind.branches[0]}", float(part.values[kind.sound_ohms])


def listen_signal(patch, circuit: Circuit, values: dict[str, np.ndarray]) -> np.ndarray:
    """The listening signal in volts, shape (m,), from the recorded ``values`` (each (m,)).

    A net, the difference of two nets, or a speaker's current times its ohms.
    """
    current = listened_current(patch)
    if current is not None:
        name, ohms = current
        return values[name] * ohms
    nets = patch.listen.nets
    sig = values[nets[0]].copy()
    if len(nets) == 2:
        sig -= values[nets[1]]
    return sig


def audible_names(patch) -> list[str]:
    """The unknowns the WAV is made of: the listened current, else the listened nets."""
    current = listened_current(patch)
    return [current[0]] if current else [n for n in patch.listen.nets if n != GROUND]


def listen_audio_volts(patch, circuit: Circuit, trace, record: list[str], t_start: float,
                       t_stop: float, rate_hz: int) -> np.ndarray:
    """The listening signal at the audio rate, shape (m,), for the WAV.

    Read from ``trace`` at AUDIO_OVERSAMPLE x ``rate_hz`` in chunks and decimated with
    :func:`sim.audio.decimate`; sample k is the signal at t_start + k / rate_hz (plus
    half a fine sample). Each chunk carries a margin of the filter's length, so the
    result does not depend on the chunking.
    """
    over = AUDIO_OVERSAMPLE
    needed = audible_names(patch)
    columns = [record.index(name) for name in needed]
    chunks = _audio_chunks(t_start, t_stop, rate_hz)
    out = np.empty(chunks[-1][1] if chunks else 0)
    for a, b, lo, hi in chunks:
        _, y = trace.uniform(rate_hz * over, t_start + lo / rate_hz, t_start + hi / rate_hz,
                             columns)
        out[a:b] = _audio_chunk_volts(patch, needed, y, a, b, lo)
    return out


def _audio_chunks(t_start: float, t_stop: float, rate_hz: int) -> list[tuple[int, int, int, int]]:
    """The chunks of :func:`listen_audio_volts`: ``(a, b, lo, hi)``, audio samples a to b
    read from samples lo to hi (a margin of the anti-alias filter's length each side)."""
    count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
    margin = audio.antialias_taps(AUDIO_OVERSAMPLE).size // AUDIO_OVERSAMPLE + 2
    chunk = max(1, int(AUDIO_CHUNK_SECONDS * rate_hz))
    return [(a, min(count, a + chunk), max(0, a - margin), min(count, a + chunk + margin))
            for a in range(0, count, chunk)]


def _audio_chunk_volts(patch, needed: list[str], y: np.ndarray, a: int, b: int, lo: int
                       ) -> np.ndarray:
    """Audio samples a to b of the listening signal from ``y`` (n, len(needed)), the
    listened unknowns read at AUDIO_OVERSAMPLE x the audio rate from audio sample lo."""
    values = {name: y[:, j] for j, name in enumerate(needed)}
    values[GROUND] = np.zeros(y.shape[0])
    part = audio.decimate(listen_signal(patch, None, values), AUDIO_OVERSAMPLE)
    return part[a - lo:a - lo + (b - a)]


def listen_label(patch) -> str:
    current = listened_current(patch)
    if current is not None:
        return f"{patch.listen.part} current x {format_quantity(current[1], 'ohm')}"
    return patch.listen.nets[0] if len(patch.listen.nets) == 1 else " - ".join(patch.listen.nets)


# ---------------------------------------------------------------------------------
# loads: speakers and the gates' outputs

#: The kind whose parts' output currents are reported (speakers: see speaker_kinds).
GATE_KIND = "inverter"

#: The ground net: 0 V by definition, never a recorded unknown.
GROUND = "gnd"

def _listened_names(patch) -> list[str]:
    """The probes, the listening nets or listened current, and ``vdd``."""
    current = listened_current(patch)
    return [*patch.probes, *patch.listen.nets, "vdd", *([current[0]] if current else [])]


def _speaker_names(patch) -> list[str]:
    """Each speaker's nets and coil current (what its report reads)."""
    names = []
    for ref, part in patch.parts.items():
        kind = blocks.REGISTRY[part.kind]
        if kind.sound_ohms:
            names += [*part.nets[kind.terminals[0][0]], f"{ref}.{kind.branches[0]}"]
    return names


def load_record_names(patch) -> list[str]:
    """Nets and currents a render records for the load report, besides probes and
    listening nets: each speaker's nets and coil current, each gate's input and output
    nets (``gnd`` excluded: it is 0 V and never an unknown)."""
    names = _speaker_names(patch)
    for part in patch.parts.values():
        if part.kind == GATE_KIND:
            names += [part.nets["in"][0], part.nets["out"][0]]
    return [name for name in names if name != GROUND]


def speaker_report(patch, values: dict[str, np.ndarray], warnings: list[str]) -> dict:
    """``{REF: {"power_mw", "dc_ma"}}`` for every speaker; appends a warning for DC through one.

    power_mw: mean electrical power into the speaker, mean(v i) over the record (the
    coil's reactive power averages out; what is left heats the coil or moves the cone).
    dc_ma: mean coil current. ``values`` maps recorded names (and ``gnd``) to (m,) arrays.
    """
    out = {}
    for ref, part in patch.parts.items():
        kind = blocks.REGISTRY[part.kind]
        if not kind.sound_ohms:
            continue
        plus, minus = part.nets[kind.terminals[0][0]]
        amps = values[f"{ref}.{kind.branches[0]}"]
        volts = values[plus] - values[minus]
        dc_amps = float(np.mean(amps))
        rms_amps = float(np.sqrt(np.mean(amps * amps)))
        out[ref] = {"power_mw": float(np.mean(volts * amps) * 1e3), "dc_ma": dc_amps * 1e3}
        if rms_amps > 0.0 and abs(dc_amps) > SPEAKER_DC_FRACTION * rms_amps:
            warnings.append(
                f"speaker {ref} carries a DC current of {dc_amps * 1e3:.2f} mA "
                f"({abs(dc_amps) / rms_amps:.0%} of its RMS current): it pushes the cone off "
                "centre and heats the coil without sound; put a capacitor in series or drive "
                "the speaker bridged between two outputs in antiphase")
    return out


def gate_output_amps(rows: np.ndarray, vin_volts: np.ndarray, vout_volts: np.ndarray,
                     vdd_volts: np.ndarray) -> np.ndarray:
    """Current (A) each gate's output delivers into its net, positive when sourcing.

    rows: (g, cols) the gates' kernel parameter rows (``Kind.row`` plus the two data
    columns); vin_volts, vout_volts: (m, g); vdd_volts: (m,), gnd at 0 V. Evaluated with
    the gates' own equations through the kernel's ``gate_currents``, as along a trace.
    Returns (m, g).
    """
    gates = rows.shape[0]
    values = np.column_stack([vdd_volts, vin_volts, vout_volts]).astype(np.float64)
    return kernel.load().gate_currents(values, 0, 0, np.arange(1, 1 + gates),
                                       np.arange(1 + gates, 1 + 2 * gates),
                                       np.ascontiguousarray(rows, dtype=np.float64))


def gate_limit_amps(rows: np.ndarray, vdd_volts: float) -> np.ndarray:
    """Output current (A) each gate can be counted on to give at supply ``vdd_volts``, (g,).

    The gate's short-circuit current (input at one rail, output held at the other) from
    its own equations, scaled down by how far the model's drive at the JESD13-B test point
    exceeds the standard's guaranteed minimum (GUARANTEED_DRIVE_*): what a chip that just
    meets the standard would give. The lesser of sinking and sourcing.
    """
    gates = rows.shape[0]
    test, drop = GUARANTEED_DRIVE_VDD, GUARANTEED_DRIVE_DROP_VOLTS
    # states: sink short, source short, sink at the test point, source at the test point
    vin = np.array([vdd_volts, 0.0, test, 0.0])
    vout = np.array([vdd_volts, 0.0, drop, test - drop])
    vdd = np.array([vdd_volts, vdd_volts, test, test])
    amps = np.abs(gate_output_amps(rows, np.repeat(vin[:, None], gates, axis=1),
                                   np.repeat(vout[:, None], gates, axis=1), vdd))
    sink = amps[0] * np.minimum(1.0, GUARANTEED_DRIVE_AMPS / amps[2])
    source = amps[1] * np.minimum(1.0, GUARANTEED_DRIVE_AMPS / amps[3])
    return np.minimum(sink, source)


def _gates(patch) -> list:
    return [(ref, part) for ref, part in patch.parts.items() if part.kind == GATE_KIND]


def gate_current_trace(patch, trace, t_from: float, rate_hz: float):
    """A trace of each gate's output current (A, sourcing positive), named by gate.

    Read it like any trace: ``uniform()`` gives the current averaged over each sample
    interval. The currents are computed from the recorded voltages at the solver's own
    points (each a solution of the circuit's equations), so the average is the mean
    current over the interval: a nanosecond edge charging the next gate's input adds its
    charge, not the brief peak it takes. ``t_from`` (s): the first grid time that will be
    read at ``rate_hz``; earlier points are skipped. None when the patch has no gates.
    """
    gates = _gates(patch)
    if not gates:
        return None
    rows, nets = _gate_rows_and_nets(gates)

    def amps(columns):  # columns: name -> (m,) volts
        zero = np.zeros_like(columns["vdd"])
        pick = [np.column_stack([columns.get(n, zero) for n in group]) for group in nets]
        return gate_output_amps(rows, pick[0], pick[1], columns["vdd"])

    names = [ref for ref, _ in gates]
    needed = [n for n in dict.fromkeys(["vdd", *nets[0], *nets[1]]) if n != GROUND]
    if isinstance(trace, StepTrace):
        first = max(0, int(np.searchsorted(trace.times, t_from - 1.0 / rate_hz)) - 3)
        # the same equations as amps(), in one compiled call over the recorded points
        currents = _gate_currents(trace.names, rows, nets, trace.values, first)
        return StepTrace(names=names, times=trace.times[first:], values=currents,
                         order=trace.order[first:], solver=trace.solver)
    rows_in = [trace.rows[trace.column(n)] for n in needed]

    def sol(t_seconds):
        y = trace.sol(t_seconds)[rows_in, :]
        return amps(dict(zip(needed, y))).T

    return DenseTrace(names=names, sol=sol, rows=list(range(len(names))), t_end=trace.t_end,
                      solver=trace.solver)


def _gate_rows_and_nets(gates) -> tuple[np.ndarray, tuple[list[str], list[str]]]:
    """The gates' kernel parameter rows (g, cols) and their (input, output) net names."""
    kind = blocks.REGISTRY[GATE_KIND]
    rows = np.array([kind.row(part.values) + [0.0, 0.0] for _, part in gates])
    return rows, ([part.nets["in"][0] for _, part in gates],
                  [part.nets["out"][0] for _, part in gates])


def _gate_currents(names: list[str], rows: np.ndarray, nets, values: np.ndarray, first: int
                   ) -> np.ndarray:
    """Each gate's output current (A, sourcing positive) at the recorded points
    ``values[first:]`` ((K, len(names)) volts of the recorded ``names``), (K - first, g):
    the kernel's ``gate_currents`` in one call (it releases the GIL)."""
    column = {n: (-1 if n == GROUND else names.index(n)) for n in ["vdd", *nets[0], *nets[1]]}
    in_cols, out_cols = (np.array([column[n] for n in group], np.int64) for group in nets)
    return kernel.load().gate_currents(np.ascontiguousarray(values), first, column["vdd"],
                                       in_cols, out_cols,
                                       np.ascontiguousarray(rows, dtype=np.float64))


def gate_peak_amps(patch, trace, t_start: float, t_stop: float, rate_hz: float
                   ) -> np.ndarray | None:
    """Largest output current (A) each gate sources or sinks, shape (g,), gates in patch
    order; None when the patch has no gates.

    The peak of the interval averages of :func:`gate_current_trace` on the grid of
    ``rate_hz`` from ``t_start`` to ``t_stop`` (s), the same grid as the report's signals.
    """
    gate_trace = gate_current_trace(patch, trace, t_start, rate_hz)
    if gate_trace is None:
        return None
    return gate_trace.uniform_peak(rate_hz, t_start, t_stop)


def output_report(patch, peak_amps: np.ndarray | None, vdd_volts: np.ndarray,
                  warnings: list[str]) -> dict:
    """``{REF: {"peak_ma", "limit_ma"}}`` for every gate; warns when a peak passes its limit.

    peak_amps: (g,) the largest interval-averaged output current of each gate, gates in
    patch order (from :func:`gate_peak_amps`); vdd_volts: (m,). peak_ma: the largest
    current sourced or sunk; limit_ma: :func:`gate_limit_amps` at the lowest supply
    voltage of the record.
    """
    gates = _gates(patch)
    if not gates:
        return {}
    kind = blocks.REGISTRY[GATE_KIND]
    rows = np.array([kind.row(part.values) + [0.0, 0.0] for _, part in gates])
    peaks = np.asarray(peak_amps)
    vdd_low = float(np.min(vdd_volts))
    limits = gate_limit_amps(rows, vdd_low)
    out = {}
    for (ref, _), peak, limit in zip(gates, peaks, limits):
        out[ref] = {"peak_ma": float(peak * 1e3), "limit_ma": float(limit * 1e3)}
        if peak > limit:
            warnings.append(
                f"{ref} is asked for more current than it can give: its output peaks at "
                f"{peak * 1e3:.1f} mA, above the {limit * 1e3:.1f} mA a gate can be counted on "
                f"for at {vdd_low:.2f} V (its short-circuit current scaled to the JESD13-B "
                "minimum drive); the level will differ from chip to chip: use a larger load "
                "resistance, a step-down transformer, or gates in parallel")
    return out


# ---------------------------------------------------------------------------------
# moving parameters (--move)


def numeric_param(patch, ref: str, name: str, label: str, action: str):
    """``(part, kind, param)`` of the numeric parameter ``ref.name`` of ``patch``.

    For commands that vary one parameter (``--move``, ``halfrail sweep``): raises
    PatchError naming the file and the part, starting with ``label`` (``--move
    RV1.taper=lin:log``), when the part or parameter is unknown or the parameter is a
    choice or text; ``action`` says what only a number can do (``move``).
    """
    from sim.patch import SUPPLY

    display = patch._source.display if patch._source is not None else patch.path
    part = patch.supply if ref == SUPPLY else patch.parts.get(ref)
    if part is None:
        raise PatchError(f"{label}: no part {ref} (parts: {', '.join([SUPPLY, *patch.parts])})",
                         file=display)
    kind = blocks.REGISTRY[part.kind]
    numeric = ", ".join(p.name for p in kind.params if not p.text and p.choices is None)
    if name not in kind.param_names:
        raise PatchError(f"{label}: {ref} ({kind.name}) has no parameter '{name}' (numeric "
                         f"parameters: {numeric})", file=display, part=ref)
    param = kind.param(name)
    if param.choices is not None or param.text:
        what = f"a choice ({', '.join(param.choices)})" if param.choices is not None else "text"
        raise PatchError(f"{label}: {name} is {what}; only a number can {action} (numeric "
                         f"parameters of a {kind.name}: {numeric})", file=display, part=ref)
    return part, kind, param


def _move_error(patch, move: Move, message: str) -> PatchError:
    display = patch._source.display if patch._source is not None else patch.path
    return PatchError(f"--move {move}: {message}", file=display, part=move.ref)


def prepare_moves(patch, opts: RenderOptions) -> tuple[object, tuple[Automation, ...]]:
    """The patch at the moves' start values and the automation that turns them.

    Each :class:`Move` of ``opts.moves`` holds its start value from power-on to
    ``opts.settle`` and reaches its stop value at ``settle + seconds``, linearly in
    between (:class:`sim.simulate.Automation`, applied inside the stepper). Only
    numeric parameters that the stepper reads at every step can move: a choice or
    text, a gate's parameter (the report reads the gates back as fixed), the ohms that
    scale a listened current, or a value that sets a capacitance, an inductance, file
    data or the longest step (fixed once compiled) raise PatchError naming the part.
    Returns ``(patch, ())`` when nothing moves.
    """
    if not opts.moves:
        return patch, ()
    from sim.patch import resolve_value

    starts: dict[str, str] = {}
    automation = []
    for move in opts.moves:
        part, _, param = numeric_param(patch, move.ref, move.param, f"--move {move}", "move")
        if part.kind == GATE_KIND:
            raise _move_error(patch, move, "a gate's parameters stay fixed within a render "
                              "(its output currents are read back from them); compare "
                              "values with halfrail sweep instead")
        if move.ref == patch.listen.part and blocks.REGISTRY[part.kind].sound_ohms == move.param:
            raise _move_error(patch, move, f"{move.param} scales the listened current into "
                              "the WAV, so it stays fixed within a render; step it with "
                              "halfrail sweep instead")
        try:
            v0, v1 = (resolve_value(param, raw) for raw in (move.start, move.stop))
        except ValueError as error:
            raise _move_error(patch, move, str(error)) from error
        starts[move.key] = move.start
        automation.append(Automation(move.ref, move.param, opts.settle,
                                     opts.settle + opts.seconds, v0, v1))
    at_start = patch.variant(starts)
    fixed = compile_patch(at_start)
    for move in opts.moves:
        other = compile_patch(at_start.variant({move.key: move.stop}))
        if not (np.array_equal(fixed.mass, other.mass) and np.array_equal(fixed.df, other.df)
                and fixed.max_step_seconds == other.max_step_seconds):
            raise _move_error(patch, move, f"{move.param} sets a capacitance, an inductance, "
                              "file data or the solver's longest step, which stay fixed "
                              "within a render; step it with halfrail sweep instead")
    return at_start, tuple(automation)


def moving_supply_amps(times, vdd_volts, values: dict, automation) -> np.ndarray:
    """Battery current (A), shape (m,), like :func:`blocks.supply.supply_amps`, with the
    supply's own parameters moving as ``automation`` turns them (times (m,) in s)."""
    from blocks.supply import supply_amps

    moving = {a.param: a for a in automation if a.ref == "supply"}
    if not moving:
        return supply_amps(times, vdd_volts, values)

    def at(name: str):
        a = moving.get(name)
        if a is None:
            return float(values[name])
        return np.interp(times, (a.t0, a.t1), (a.value0, a.value1))

    # The EMF is volts times the power-on ramp's fraction (at the ramp's start value).
    ramp = {**values, "volts": 1.0, "source_ohms": 1.0}
    if "ramp_seconds" in moving:
        ramp["ramp_seconds"] = moving["ramp_seconds"].value0
    fraction = supply_amps(times, np.zeros_like(times), ramp)
    return (at("volts") * fraction - np.asarray(vdd_volts)) / at("source_ohms")


#: A moving render glides: inside one tracking window its pitch may change by up to this
#: much between the window's first and last third (a semitone) and still be tracked;
#: the window's mean pitch is then its centre's pitch to within a few cents, because a
#: slow glide is close to linear over a window of a few periods.
GLIDE_DRIFT_LIMIT_CENTS = 100.0


def move_pitch_track(volts, rate_hz: float) -> dict:
    """Pitch over time of a moving render: ``{"times_s", "freq_hz", "window_seconds"}``.

    volts: (n,) at rate_hz. One point every MOVE_TRACK_HOP_SECONDS, each measured by
    :func:`sim.measure.find_pitch` on a window centred on it, of the first length of
    MOVE_TRACK_WINDOWS_SECONDS (starting from the one that last worked) that finds a
    steady pitch there; after a point without pitch only one length is tried per point,
    in turn, so a stretch without pitch costs one measure per point. Lists of equal
    length: times_s from the first sample; freq_hz in Hz and window_seconds, both None
    where no window finds a pitch.
    """
    x = np.asarray(volts, dtype=np.float64)
    sizes = [int(round(w * rate_hz)) for w in MOVE_TRACK_WINDOWS_SECONDS]
    hop = int(round(MOVE_TRACK_HOP_SECONDS * rate_hz))
    times, freqs, windows = [], [], []
    last, misses = 0, 0
    for centre in range(sizes[0] // 2, x.size - sizes[0] // 2 + 1, hop):
        tried = sorted(range(len(sizes)), key=lambda i: (abs(i - last), -i))
        if misses:  # in a stretch without pitch, one window per point, taking turns
            tried = [misses % len(sizes)]
        found = None
        for i in tried:
            lo, hi = centre - sizes[i] // 2, centre + sizes[i] - sizes[i] // 2
            if lo < 0 or hi > x.size:
                continue
            pitch = measure.find_pitch(x[lo:hi], rate_hz, GLIDE_DRIFT_LIMIT_CENTS)
            if pitch is not None:
                found, last = (pitch.freq_hz, MOVE_TRACK_WINDOWS_SECONDS[i]), i
                break
        misses = 0 if found else misses + 1
        times.append(centre / rate_hz)
        freqs.append(found[0] if found else None)
        windows.append(found[1] if found else None)
    return {"times_s": times, "freq_hz": freqs, "window_seconds": windows}


class ProgressLine:
    """``label:  45% [#########...........] 4.60/10.20 s simulated`` on standard error,
    redrawn in place; for a terminal only (a log would collect every redraw).

    Written here rather than by a progress-bar library: importing one took 0.05 s of a
    render's start, before its first step."""

    #: Characters of the bar.
    WIDTH = 24

    def __init__(self, label: str, total_seconds: float):
        self.label = label
        self.total = total_seconds

    def show(self, seconds: float) -> None:
        done = min(max(seconds / self.total, 0.0), 1.0)
        filled = int(round(done * self.WIDTH))
        sys.stderr.write(f"\r{self.label}: {done * 100:3.0f}% [{'#' * filled}"
                         f"{'.' * (self.WIDTH - filled)}] {min(seconds, self.total):.2f}/"
                         f"{self.total:.2f} s simulated")
        sys.stderr.flush()

    def close(self) -> None:
        sys.stderr.write("\n")
        sys.stderr.flush()


def simulate_patch(patch, opts: RenderOptions, record: list[str], progress_label: str = "",
                   automation: tuple[Automation, ...] = (), running=None, on_chunk=None):
    """Compile and run ``patch`` for settle + seconds; returns (circuit, trace).

    automation: parameters moving in time (see :func:`prepare_moves`). running: optional
    callable, called once when the compiled stepper has run its first chunk (its code is
    loaded and it now runs without the GIL), or after the reference solver has finished.
    on_chunk: the compiled stepper's per-chunk hook (see :func:`sim.simulate.simulate`).
    """
    circuit = compile_patch(patch)
    total = opts.settle + opts.seconds
    if opts.solver == "reference":
        trace = simulate_reference(circuit, total, record, automation=automation)
        if running is not None:
            running()
        return circuit, trace
    bar = None
    if opts.progress and total > PROGRESS_ABOVE_SECONDS and sys.stderr.isatty():
        bar = ProgressLine(progress_label or patch.name, total)
    waiting = [running] if running is not None else []

    def progress(t):
        if waiting:
            waiting.pop()()
        if bar is not None:
            bar.show(t)

    try:
        trace = simulate(circuit, total, record, opts.step_options(), automation=automation,
                         progress=progress if bar is not None or waiting else None,
                         audible=audible_names(patch), on_chunk=on_chunk)
    finally:
        if bar is not None:
            bar.close()
    if waiting:  # a run shorter than one chunk
        waiting.pop()()
    return circuit, trace


def report_signal_names(patch) -> list[str]:
    """Names a render reads on its uniform grid (:attr:`Rendered.signals`): the probes, the
    listening nets or listened current, ``vdd``, and each speaker's nets and coil current.
    The gates' nets are recorded too, but only read through their output currents."""
    names = [*_listened_names(patch), *_speaker_names(patch)]
    return [name for name in dict.fromkeys(names) if name != GROUND]


#: Markers put on a :class:`_TraceStream`'s queue after the last batch.
_END, _ABORT = "end", "abort"

#: Points kept from one batch to the next: the steps before a reader's start (a step's
#: interpolant reaches two points back; :func:`gate_current_trace` starts three back).
_TAIL_POINTS = 3


class _TraceStream:
    """The readers of a render run on the trace while the simulation computes it.

    The simulation's thread calls :meth:`on_chunk` (it only queues the points); a pool
    thread runs :meth:`run`, which feeds them to :class:`sim.trace.GridReader` walks:
    the report's signals, the gates' output currents and their peak, and each chunk of
    the WAV path (:func:`_audio_chunks`), decimated as soon as its reads are done. Each
    gives the same numbers to the bit as the same reader run on the finished trace.
    """

    def __init__(self, patch, record: list[str], opts: "RenderOptions", always: bool = True):
        self.patch = patch
        self.always = always  # else read beside only a slow simulation ("auto")
        self.active = True  # False once "auto" decided to read after the simulation
        self.launch = None  # submits run() to the pool, set once the imports are started
        self.warm = None  # the imports' future
        self.mark = None  # (simulated s, wall s, imports done) at the end of a chunk
        fine_rate = opts.rate_hz * OVERSAMPLE
        self.t_start, t_stop = opts.settle, opts.settle + opts.seconds
        self.fine_rate = fine_rate
        self.record = record
        self.queue: queue.SimpleQueue = queue.SimpleQueue()
        self.pending: list = []
        self.job = None  # the future of run(), once submitted
        names = report_signal_names(patch)
        self.signals = GridReader(fine_rate, self.t_start, t_stop, [record.index(n) for n in names])
        gates = _gates(patch)
        self.gates = _gate_rows_and_nets(gates) if gates else None
        self.gate_first = None  # trace index where the gates' current trace starts
        self.gate_peak = GridReader(fine_rate, self.t_start, t_stop, peak=True)
        self.rate_hz = opts.rate_hz
        self.needed = audible_names(patch) if opts.wav else []
        self.audio_chunks = _audio_chunks(self.t_start, t_stop, opts.rate_hz) if opts.wav else []
        self.audio_open: dict[int, GridReader] = {}
        self.audio_next = 0  # the next chunk to open
        self.audio_volts = np.empty(self.audio_chunks[-1][1] if self.audio_chunks else 0)

    # -- the simulation's thread

    def on_chunk(self, times, values, orders) -> None:
        """simulate()'s hook: queue the chunk; hand a batch over every STREAM_BATCH_SECONDS."""
        if not self.active:
            return
        self.pending.append((times, values, orders))
        if self.job is None and not self.always:
            self._pace(float(times[-1]))
            if not self.active:
                return
        if times[-1] - self.pending[0][0][0] >= STREAM_BATCH_SECONDS:
            self._hand_over()
            if self.job is not None and self.job.done():
                self.job.result()  # the reader failed: stop the simulation with its error

    def _pace(self, t: float) -> None:
        """For "auto": at the end of the first chunk run after the imports beside the
        simulation are done (beside them, the oscillator's chunks take 1.5 to 2.5 times
        as long), read beside the simulation if that chunk was slower than
        STREAM_ABOVE_SECONDS_PER_SECOND, else drop everything queued and let the render
        read the finished trace."""
        now = time.perf_counter()
        if self.mark is None or not self.mark[2]:
            # (mark[2]: the imports were done when the chunk before this one ended)
            self.mark = (t, now, self.warm is not None and self.warm.done())
            return
        t0, wall0, _ = self.mark
        if t <= t0:
            return
        if (now - wall0) / (t - t0) > STREAM_ABOVE_SECONDS_PER_SECOND:
            self.job = self.launch()
        else:
            self.active = False
            self.pending = []
            self.queue = queue.SimpleQueue()

    def _hand_over(self) -> None:
        if self.pending:
            self.queue.put(tuple(np.concatenate(p) for p in zip(*self.pending)))
            self.pending = []

    def end(self) -> None:
        """After the simulation's last chunk."""
        self._hand_over()
        self.queue.put(_END)

    def abort(self) -> None:
        """The simulation failed: run() returns without finishing."""
        self.queue.put(_ABORT)

    # -- the pool's thread

    def run(self, warm_job):
        """Read batches until the end; returns (times, (count, m) signals, gate peaks or
        None, audio volts or None). warm_job: the imports' future, waited for first (so
        this thread does not compete with them and the simulation for two cores)."""
        warm_job.result()
        index = 0  # trace index of the next point
        tail = None  # the last _TAIL_POINTS points: (index, times, values, orders)
        while True:
            items = [self.queue.get()]
            while items[-1] not in (_END, _ABORT):  # whatever else is waiting: one batch
                try:
                    items.append(self.queue.get_nowait())
                except queue.Empty:
                    break
            if items[-1] is _ABORT:
                return None
            batches = [item for item in items if item is not _END]
            if batches:
                times, values, orders = (np.concatenate(p) for p in zip(*batches))
                tail = self._feed(index, times, values, orders, tail)
                index += times.size
            if items[-1] is _END:
                return self._finish(tail)

    def _window(self, tail, index, times, values, orders):
        """The tail before a batch and the batch, with the trace index of its first point."""
        if tail is None:
            return index, times, values, orders
        return (tail[0], *(np.concatenate((old, new)) for old, new in
                           zip(tail[1:], (times, values, orders))))

    def _feed(self, index, times, values, orders, tail):
        self.signals.feed(index, times, values, orders)
        start, *window = self._window(tail, index, times, values, orders)
        if self.gates is not None:
            self._feed_gates(index, (times, values, orders), start, window, final=False)
        self._feed_audio(index, (times, values, orders), start, window)
        keep = max(0, window[0].size - _TAIL_POINTS)
        return (start + keep, *(a[keep:] for a in window))

    def _feed_gates(self, index, batch, start, window, final: bool) -> None:
        rows, nets = self.gates
        if self.gate_first is None:
            t_from = self.t_start - 1.0 / self.fine_rate
            found = int(np.searchsorted(window[0], t_from))
            if found == window[0].size and not final:
                return
            # as gate_current_trace: three points before the first at or after t_from
            self.gate_first = max(0, start + found - 3)
            cut = self.gate_first - start
            at, batch = self.gate_first, tuple(a[cut:] for a in window)
        else:
            at = index
        currents = _gate_currents(self.record, rows, nets, batch[1], 0)
        self.gate_peak.feed(at - self.gate_first, batch[0], currents, batch[2])

    def _feed_audio(self, index, batch, start, window) -> None:
        for c, reader in self.audio_open.items():
            reader.feed(index, *batch)
        d = 1.0 / (self.rate_hz * AUDIO_OVERSAMPLE)
        while self.audio_next < len(self.audio_chunks):
            reader = self._audio_reader(self.audio_next)
            if window[0][-1] < reader.t_first - 0.5 * d:
                break  # the trace has not reached it yet
            reader.feed(start, *window)
            self.audio_open[self.audio_next] = reader
            self.audio_next += 1
        for c in [c for c, reader in self.audio_open.items() if reader.done]:
            self._decimate(c, self.audio_open.pop(c).finish()[1])

    def _audio_reader(self, c: int) -> GridReader:
        """The 16x-grid reader of the WAV path's chunk c, margins included."""
        _, _, lo, hi = self.audio_chunks[c]
        return GridReader(self.rate_hz * AUDIO_OVERSAMPLE, self.t_start + lo / self.rate_hz,
                          self.t_start + hi / self.rate_hz,
                          [self.record.index(n) for n in self.needed])

    def _decimate(self, c: int, y: np.ndarray) -> None:
        a, b, lo, _ = self.audio_chunks[c]
        self.audio_volts[a:b] = _audio_chunk_volts(self.patch, self.needed, y, a, b, lo)

    def _finish(self, tail):
        if tail is None:
            raise ValueError("the simulation handed over no points")
        empty = tuple(a[:0] for a in tail[1:])
        if self.gates is not None and self.gate_first is None:
            self._feed_gates(tail[0] + tail[1].size, empty, tail[0], tail[1:], final=True)
        while self.audio_next < len(self.audio_chunks):  # a trace ending before a chunk
            reader = self._audio_reader(self.audio_next)
            reader.feed(tail[0], *tail[1:])
            self.audio_open[self.audio_next] = reader
            self.audio_next += 1
        for c in sorted(self.audio_open):
            self._decimate(c, self.audio_open.pop(c).finish()[1])
        times, signals = self.signals.finish()
        peaks = self.gate_peak.finish() if self.gates is not None else None
        return times, signals, peaks, (self.audio_volts if self.needed else None)


def warm_up(wav: bool, plots_too: bool, patch=None, record: list[str] | None = None) -> None:
    """Import what a render needs after its simulation and load its compiled readers
    from numba's disk cache (run in a thread while the simulation runs).

    wav: also the WAV path's; plots_too: also import the plots (Pillow; renders that write);
    patch and record (the recorded names): also the gates' output currents.
    """
    tiny = StepTrace(names=["v"], times=np.array([0.0, 0.5, 1.0]), values=np.zeros((3, 1)),
                     order=np.array([1, 1, 2], dtype=np.int64))
    tiny.uniform(4.0, 0.0, 1.0)
    tiny.uniform_peak(4.0, 0.0, 1.0)
    if patch is not None and record:
        at_rest = StepTrace(names=list(record), times=tiny.times,
                            values=np.zeros((3, len(record))), order=tiny.order)
        gate_peak_amps(patch, at_rest, 0.0, 1.0, 4.0)
    measure.load_compiled()
    if wav:
        import soundfile  # noqa: F401

        audio.decimate(np.zeros(2 * AUDIO_OVERSAMPLE), AUDIO_OVERSAMPLE)
    if plots_too:
        from sim import plots  # noqa: F401


def wav_path(patch, circuit: Circuit, trace, record: list[str], opts: RenderOptions
             ) -> tuple[np.ndarray, np.ndarray, dict]:
    """The listening signal at the WAV's rate (:func:`listen_audio_volts`), its WAV
    samples and their levels (:func:`sim.audio.to_wav_samples`)."""
    return _wav_of(listen_audio_volts(patch, circuit, trace, record, opts.settle,
                                      opts.settle + opts.seconds, opts.rate_hz), opts)


def _streamed_wav_path(stream_job, opts: RenderOptions) -> tuple[np.ndarray, np.ndarray, dict]:
    """:func:`wav_path` from the audio volts read during the simulation (``stream_job``)."""
    return _wav_of(stream_job.result()[3], opts)


def _wav_of(volts: np.ndarray, opts: RenderOptions) -> tuple[np.ndarray, np.ndarray, dict]:
    """(volts, WAV samples, their levels) of the listening signal at the WAV's rate."""
    samples, info = audio.to_wav_samples(volts, full_scale_volts=opts.full_scale_volts,
                                         normalize=opts.normalize, rate_hz=opts.rate_hz)
    return volts, samples, info


def render(patch, out_dir: str | os.PathLike = "renders", opts: RenderOptions | None = None,
           write: bool = True) -> Rendered:
    """Simulate ``patch`` and write ``<patch>.wav``, ``.png``, ``.spectrum.png`` and ``.json``.

    With ``write=False`` nothing is written (the report and signals are still returned).
    Runs parts of the work in RENDER_THREADS threads; the results do not depend on it.
    """
    opts = opts or RenderOptions()
    opts.check()
    if write and not opts.wav:
        raise UsageError("a render written to files needs its WAV path (RenderOptions.wav)")
    as_given = patch
    patch, automation = prepare_moves(patch, opts)

    # (a wrong listen fails here, before the simulation)
    record = list(dict.fromkeys([*_listened_names(patch), *load_record_names(patch)]))
    stream = (_TraceStream(patch, record, opts, always=STREAM_DURING_SIMULATION is True)
              if STREAM_DURING_SIMULATION and opts.solver == "compiled" else None)
    with ThreadPoolExecutor(RENDER_THREADS, thread_name_prefix="halfrail-render") as pool:
        warm = []

        def running():
            # the imports start once the stepper runs without the GIL (loading its code
            # from the disk cache needs the GIL: importing beside it would slow it down)
            warm.append(pool.submit(warm_up, opts.wav, write, patch, record))
            if stream is not None:
                stream.launch = lambda: pool.submit(stream.run, warm[0])
                stream.warm = warm[0]
                if stream.always:
                    stream.job = stream.launch()

        try:
            circuit, trace = simulate_patch(patch, opts, record, automation=automation,
                                            running=running,
                                            on_chunk=stream.on_chunk if stream else None)
            if stream is not None:
                stream.end()
            # not waited for here: the readers start at once (a reader not loaded yet
            # loads itself, under numba's lock), and the plots wait for their imports
            return _after_simulation(pool, patch, as_given, automation, circuit, trace,
                                     record, out_dir, opts, write, warm[0],
                                     stream.job if stream else None)
        except BaseException:
            if stream is not None:
                stream.abort()
            pool.shutdown(wait=True, cancel_futures=True)
            raise


def _after_simulation(pool, patch, as_given, automation, circuit, trace, record, out_dir,
                      opts: RenderOptions, write: bool, warm_job, stream_job=None) -> Rendered:
    """The rest of :func:`render`: measures, loads, WAV, plots and report from ``trace``.

    warm_job: the future of :func:`warm_up`, still running perhaps (waited for before
    drawing, and before returning so that its errors are not lost). stream_job: the
    future of :meth:`_TraceStream.run` when the trace was read during the simulation
    (its signals, gate peaks and audio volts are then taken from it)."""
    fine_rate = opts.rate_hz * OVERSAMPLE
    t_start, t_stop = opts.settle, opts.settle + opts.seconds
    names = report_signal_names(patch)
    if stream_job is not None:
        wav_job = pool.submit(_streamed_wav_path, stream_job, opts) if opts.wav else None
        peaks_job = pool.submit(lambda: stream_job.result()[2])
        times, y = stream_job.result()[:2]
    else:
        # the WAV path first: the spectrum plot waits for it
        wav_job = pool.submit(wav_path, patch, circuit, trace, record, opts) if opts.wav else None
        peaks_job = pool.submit(gate_peak_amps, patch, trace, t_start, t_stop, fine_rate)
        times, y = trace.uniform(fine_rate, t_start, t_stop, [record.index(n) for n in names])
    values = {name: y[:, j] for j, name in enumerate(names)}
    values[GROUND] = np.zeros(times.shape)  # (pages not touched until read)
    warnings = supply_warnings(float(patch.supply.values["volts"]))
    for a in automation:
        if (a.ref, a.param) == ("supply", "volts"):
            warnings += [w for w in supply_warnings(a.value1) if w not in warnings]

    probes = {net: measure.measure_signal(values[net], fine_rate) for net in patch.probes}
    listen_fine = listen_signal(patch, circuit, values)
    if patch.listen.part is None and len(patch.listen.nets) == 1 and patch.listen.nets[0] in probes:
        # the same samples as that probe: the same measures
        listen_report = copy.deepcopy(probes[patch.listen.nets[0]])
    else:
        listen_report = measure.measure_signal(listen_fine, fine_rate)
    amps = moving_supply_amps(times, values["vdd"], patch.supply.values, automation)
    supply = {"mean_ma": float(np.mean(amps) * 1e3), "peak_ma": float(np.max(amps) * 1e3),
              "volts_min": float(np.min(values["vdd"]))}
    speakers = speaker_report(patch, values, warnings)
    pitch_track = move_pitch_track(listen_fine, fine_rate) if automation else None

    title = f"{patch.name}: {_pitch_text(listen_report)} at {listen_label(patch)}"
    if automation:
        title = f"{patch.name}: {_move_text(automation, pitch_track)} at {listen_label(patch)}"
    png = spectrum_job = wav_file_job = None
    if write:
        base = Path(out_dir) / patch.name
        Path(out_dir).mkdir(parents=True, exist_ok=True)
        wav_file_job = pool.submit(_write_wav, base.with_suffix(".wav"), wav_job, opts.rate_hz)
        warm_job.result()  # the plots imported
        spectrum_job = pool.submit(_spectrum_plot, base, patch, opts, listen_report, wav_job)
        # this thread would only wait for the gates and the WAV path: it draws meanwhile,
        # beside the spectrum and with no lock (each figure, a sim.canvas.Sheet, has its
        # own image and font objects, and Pillow's FreeType calls hold the GIL)
        png = _waveform_plot(base, patch, opts, times, values, listen_fine, listen_report,
                             supply, title)

    outputs = output_report(patch, peaks_job.result(), values["vdd"], warnings)
    warm_job.result()
    listen_audio, _, info = wav_job.result() if wav_job is not None else (None, None, None)
    if info is not None:
        warnings.extend(audio.level_warnings(info, opts.full_scale_volts))

    report = {
        "patch": patch.name,
        "seconds": opts.seconds,
        "sample_rate": opts.rate_hz,
        "probes": probes,
        "listen": listen_report,
        "listen_label": listen_label(patch),
        "supply": supply,
        "speakers": speakers,
        "outputs": outputs,
        "warnings": warnings,
        "audio": {"full_scale_volts": opts.full_scale_volts, **info} if info else None,
        "settle_seconds": opts.settle,
        "overrides": list(getattr(as_given, "overrides", ())),
        "solver": {"name": trace.solver, **trace.counters},
    }
    if automation:
        report["moves"] = [{"param": f"{a.ref}.{a.param}", "start": a.value0, "stop": a.value1,
                            "from_seconds": a.t0, "to_seconds": a.t1} for a in automation]
        report["pitch_track"] = pitch_track
    result = Rendered(report=report, times=times, signals=values, listen=listen_fine,
                      sample_rate_hz=fine_rate, audio_volts=listen_audio)
    if not write:
        return result
    wav = wav_file_job.result()
    spectrum = spectrum_job.result()
    js = Path(f"{base}.json")
    write_json(js, report)
    result.paths = [wav, png, spectrum, js]
    return result


def _write_wav(path: Path, wav_job, rate_hz: int) -> Path:
    """Write the samples of ``wav_job`` (a :func:`wav_path` result) to ``path``."""
    audio.write_wav(path, wav_job.result()[1], rate_hz)
    return path


def _waveform_plot(base: Path, patch, opts: RenderOptions, times, values, listen_fine,
                   listen_report, supply, title) -> Path:
    """Write ``<base>.png``, the probes (or the listening signal) over PLOT_PERIODS
    periods of the pitch; returns its path."""
    from sim import plots

    png = Path(f"{base}.png")
    span = PLOT_NO_PITCH_SECONDS
    if listen_report["freq_hz"]:
        span = max(PLOT_MIN_SECONDS, PLOT_PERIODS / listen_report["freq_hz"])
    shown = times < times[0] + span
    subtitle = (f"supply {patch.supply.values['volts']:g} V, {supply['mean_ma']:.2f} mA mean; "
                f"from {opts.settle * 1e3:g} ms after power-on")
    plots.waveform_plot(png, times[shown] - opts.settle,
                        {net: values[net][shown] for net in patch.probes} or
                        {listen_label(patch): listen_fine[shown]}, title, subtitle)
    return png


def _spectrum_plot(base: Path, patch, opts: RenderOptions, listen_report, wav_job) -> Path:
    """Write ``<base>.spectrum.png`` from the listening signal of ``wav_job`` (a
    :func:`wav_path` result); returns its path."""
    from sim import plots

    spectrum = Path(f"{base}.spectrum.png")
    listen_audio = wav_job.result()[0]
    plots.spectrum_plot(spectrum, listen_audio, opts.rate_hz, listen_report["freq_hz"],
                        f"{patch.name}: spectrum at {listen_label(patch)}, "
                        f"{_pitch_text(listen_report)}")
    return spectrum


def _pitch_text(m: dict) -> str:
    if not m.get("freq_hz"):
        return "no steady pitch"
    return f"{m['freq_hz']:.2f} Hz = {m['note']} {m['cents']:+.1f} cents"


def _move_text(automation, pitch_track: dict) -> str:
    """``RV1.position 0 to 1, pitch 310.2 to 620.9 Hz`` for a moving render."""
    moved = ", ".join(f"{a.ref}.{a.param} {a.value0:.4g} to {a.value1:.4g}" for a in automation)
    found = [f for f in pitch_track["freq_hz"] if f is not None]
    if not found:
        return f"{moved}, no steady pitch"
    return f"{moved}, pitch {found[0]:.1f} to {found[-1]:.1f} Hz"
