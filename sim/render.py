"""Render a patch: simulate from power-on, then write the WAV, the plots and the report.

:func:`render` is the library entry point behind ``halfrail render``; the CLI only
parses options into :class:`RenderOptions` and prints the paths this returns.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import blocks
from sim import audio, kernel, measure, plots
from sim.compile import Circuit, compile_patch
from sim.errors import PatchError, UsageError
from sim.fileio import write_json
from sim.simulate import StepOptions, simulate, simulate_reference
from sim.trace import DenseTrace, StepTrace
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
LISTEN_CURRENT_OHMS = {"speaker": "ohms"}

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

    def step_options(self) -> StepOptions:
        rtol = QUALITIES[self.quality]
        return StepOptions(rtol=rtol, atol_volts=rtol / 10.0)


@dataclass
class Rendered:
    """What a render produced: the report (as written to JSON) and the files."""

    report: dict
    paths: list[Path] = field(default_factory=list)
    times: np.ndarray | None = None
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
    file, line and part when the part's kind has no current to play (see
    LISTEN_CURRENT_OHMS).
    """
    ref = patch.listen.part
    if ref is None:
        return None
    part = patch.parts[ref]
    if part.kind not in LISTEN_CURRENT_OHMS:
        raise PatchError(f"listen: {ref} is a {part.kind}; the current of a "
                         f"{' or '.join(LISTEN_CURRENT_OHMS)} can be listened to, not of a "
                         f"{part.kind}: listen to a net, [plus, minus], or the speaker it drives",
                         file=patch.path, line=patch.listen.line, part=ref)
    branch = blocks.REGISTRY[part.kind].branches[0]
    return f"{ref}.{branch}", float(part.values[LISTEN_CURRENT_OHMS[part.kind]])


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


def listen_audio_volts(patch, circuit: Circuit, trace, record: list[str], t_start: float,
                       t_stop: float, rate_hz: int) -> np.ndarray:
    """The listening signal at the audio rate, shape (m,), for the WAV.

    Read from ``trace`` at AUDIO_OVERSAMPLE x ``rate_hz`` in chunks and decimated with
    :func:`sim.audio.decimate`; sample k is the signal at t_start + k / rate_hz (plus
    half a fine sample). Each chunk carries a margin of the filter's length, so the
    result does not depend on the chunking.
    """
    over = AUDIO_OVERSAMPLE
    count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
    margin = audio.antialias_taps(over).size // over + 2
    chunk = max(1, int(AUDIO_CHUNK_SECONDS * rate_hz))
    out = np.empty(count)
    for a in range(0, count, chunk):
        b = min(count, a + chunk)
        lo, hi = max(0, a - margin), min(count, b + margin)
        _, y = trace.uniform(rate_hz * over, t_start + lo / rate_hz, t_start + hi / rate_hz)
        values = {name: y[:, j] for j, name in enumerate(record)}
        values[GROUND] = np.zeros(y.shape[0])
        part = audio.decimate(listen_signal(patch, circuit, values), over)
        out[a:b] = part[a - lo:a - lo + (b - a)]
    return out


def listen_label(patch) -> str:
    current = listened_current(patch)
    if current is not None:
        return f"{patch.listen.part} current x {format_quantity(current[1], 'ohm')}"
    return patch.listen.nets[0] if len(patch.listen.nets) == 1 else " - ".join(patch.listen.nets)


# ---------------------------------------------------------------------------------
# loads: speakers and the gates' outputs

#: The kind whose parts' output currents are reported, and the kind whose power is.
GATE_KIND = "inverter"
SPEAKER_KIND = "speaker"

#: The ground net: 0 V by definition, never a recorded unknown.
GROUND = "gnd"

#: Samples evaluated per batch when computing output currents (bounds the memory used:
#: a few MB for a package of gates).
OUTPUT_BATCH_SAMPLES = 8192


def load_record_names(patch) -> list[str]:
    """Nets and currents a render records for the load report, besides probes and
    listening nets: each speaker's nets and coil current, each gate's input and output
    nets (``gnd`` excluded: it is 0 V and never an unknown)."""
    names = []
    for ref, part in patch.parts.items():
        if part.kind == SPEAKER_KIND:
            branch = blocks.REGISTRY[SPEAKER_KIND].branches[0]
            names += [*part.nets["between"], f"{ref}.{branch}"]
        elif part.kind == GATE_KIND:
            names += [part.nets["in"][0], part.nets["out"][0]]
    return [name for name in names if name != GROUND]


def speaker_report(patch, values: dict[str, np.ndarray], warnings: list[str]) -> dict:
    """``{REF: {"power_mw", "dc_ma"}}`` for every speaker; appends a warning for DC through one.

    power_mw: mean electrical power into the speaker, mean(v i) over the record (the
    coil's reactive power averages out; what is left heats the coil or moves the cone).
    dc_ma: mean coil current. ``values`` maps recorded names (and ``gnd``) to (m,) arrays.
    """
    out = {}
    branch = blocks.REGISTRY[SPEAKER_KIND].branches[0]
    for ref, part in patch.parts.items():
        if part.kind != SPEAKER_KIND:
            continue
        plus, minus = part.nets["between"]
        amps = values[f"{ref}.{branch}"]
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
    the gates' own equations through the compiled kernel. Returns (m, g).
    """
    k = kernel.load()
    order = kernel.kind_order()
    gates, cols = rows.shape
    size = 2 + 2 * gates  # gnd, vdd, then (in, out) of each gate
    tab = np.zeros((len(order), kernel.TAB_SIZE), np.int64)
    tab[order.index(GATE_KIND)] = (0, cols, 0, 4, gates, 0, 0)
    pf = np.ascontiguousarray(rows, dtype=np.float64).ravel()
    nf = np.array([[2 + 2 * j, 3 + 2 * j, 1, 0] for j in range(gates)], np.int64).ravel()
    df = np.zeros(1)
    count = vin_volts.shape[0]
    out = np.empty((count, gates))
    for start in range(0, count, OUTPUT_BATCH_SAMPLES):
        stop = min(count, start + OUTPUT_BATCH_SAMPLES)
        x = np.zeros((stop - start, size))
        x[:, 1] = vdd_volts[start:stop]
        x[:, 2::2] = vin_volts[start:stop]
        x[:, 3::2] = vout_volts[start:stop]
        f = np.zeros_like(x)
        k.evaluate_rows(x, 0.0, pf, nf, tab, df, f)
        out[start:stop] = -f[:, 3::2]  # f is the current flowing into the gate at out
    return out


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
    kind = blocks.REGISTRY[GATE_KIND]
    rows = np.array([kind.row(part.values) + [0.0, 0.0] for _, part in gates])
    nets = ([part.nets["in"][0] for _, part in gates], [part.nets["out"][0] for _, part in gates])

    def amps(columns):  # columns: name -> (m,) volts
        zero = np.zeros_like(columns["vdd"])
        pick = [np.column_stack([columns.get(n, zero) for n in group]) for group in nets]
        return gate_output_amps(rows, pick[0], pick[1], columns["vdd"])

    names = [ref for ref, _ in gates]
    needed = [n for n in dict.fromkeys(["vdd", *nets[0], *nets[1]]) if n != GROUND]
    if isinstance(trace, StepTrace):
        first = max(0, int(np.searchsorted(trace.times, t_from - 1.0 / rate_hz)) - 3)
        columns = {n: trace.values[first:, trace.column(n)] for n in needed}
        return StepTrace(names=names, times=trace.times[first:], values=amps(columns),
                         order=trace.order[first:], solver=trace.solver)
    rows_in = [trace.rows[trace.column(n)] for n in needed]

    def sol(t_seconds):
        y = trace.sol(t_seconds)[rows_in, :]
        return amps(dict(zip(needed, y))).T

    return DenseTrace(names=names, sol=sol, rows=list(range(len(names))), t_end=trace.t_end,
                      solver=trace.solver)


def output_report(patch, gate_amps: np.ndarray | None, vdd_volts: np.ndarray,
                  warnings: list[str]) -> dict:
    """``{REF: {"peak_ma", "limit_ma"}}`` for every gate; warns when a peak passes its limit.

    gate_amps: (m, g) interval-averaged output currents, gates in patch order (from
    :func:`gate_current_trace`); vdd_volts: (m,). peak_ma: the largest current sourced or
    sunk; limit_ma: :func:`gate_limit_amps` at the lowest supply voltage of the record.
    """
    gates = _gates(patch)
    if not gates:
        return {}
    kind = blocks.REGISTRY[GATE_KIND]
    rows = np.array([kind.row(part.values) + [0.0, 0.0] for _, part in gates])
    peaks = np.max(np.abs(gate_amps), axis=0)
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


def simulate_patch(patch, opts: RenderOptions, record: list[str], progress_label: str = ""):
    """Compile and run ``patch`` for settle + seconds; returns (circuit, trace)."""
    circuit = compile_patch(patch)
    total = opts.settle + opts.seconds
    if opts.solver == "reference":
        return circuit, simulate_reference(circuit, total, record)
    bar = None
    progress = None
    if opts.progress and total > PROGRESS_ABOVE_SECONDS:
        from tqdm import tqdm

        bar = tqdm(total=round(total, 3), unit="s", desc=progress_label or patch.name,
                   bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.2f}/{total:.2f} s simulated")

        def progress(t):
            bar.n = round(min(t, total), 3)
            bar.refresh()

    try:
        trace = simulate(circuit, total, record, opts.step_options(), progress=progress)
    finally:
        if bar is not None:
            bar.close()
    return circuit, trace


def render(patch, out_dir: str | os.PathLike = "renders", opts: RenderOptions | None = None,
           write: bool = True) -> Rendered:
    """Simulate ``patch`` and write ``<patch>.wav``, ``.png``, ``.spectrum.png`` and ``.json``.

    With ``write=False`` nothing is written (the report and signals are still returned).
    """
    opts = opts or RenderOptions()
    opts.check()
    from blocks.supply import supply_amps

    current = listened_current(patch)  # a wrong listen: fails before the simulation
    record = list(dict.fromkeys([*patch.probes, *patch.listen.nets, "vdd",
                                 *([current[0]] if current else []), *load_record_names(patch)]))
    circuit, trace = simulate_patch(patch, opts, record)
    fine_rate = opts.rate_hz * OVERSAMPLE
    times, y = trace.uniform(fine_rate, opts.settle, opts.settle + opts.seconds)
    values = {name: y[:, j] for j, name in enumerate(record)}
    values[GROUND] = np.zeros_like(times)
    gate_trace = gate_current_trace(patch, trace, opts.settle, fine_rate)
    gate_amps = (gate_trace.uniform(fine_rate, opts.settle, opts.settle + opts.seconds)[1]
                 if gate_trace is not None else None)
    warnings = supply_warnings(float(patch.supply.values["volts"]))

    probes = {net: measure.measure_signal(values[net], fine_rate) for net in patch.probes}
    listen_fine = listen_signal(patch, circuit, values)
    listen_report = measure.measure_signal(listen_fine, fine_rate)
    amps = supply_amps(times, values["vdd"], patch.supply.values)
    supply = {"mean_ma": float(np.mean(amps) * 1e3), "peak_ma": float(np.max(amps) * 1e3),
              "volts_min": float(np.min(values["vdd"]))}
    speakers = speaker_report(patch, values, warnings)
    outputs = output_report(patch, gate_amps, values["vdd"], warnings)

    listen_audio = listen_audio_volts(patch, circuit, trace, record, opts.settle,
                                      opts.settle + opts.seconds, opts.rate_hz)
    samples, info = audio.to_wav_samples(listen_audio, full_scale_volts=opts.full_scale_volts,
                                         normalize=opts.normalize, rate_hz=opts.rate_hz)
    if info["clipped_samples"]:
        warnings.append(f"the WAV clipped {info['clipped_samples']} samples: the listening signal "
                        f"exceeds the {opts.full_scale_volts:g} V full scale (use --full-scale or "
                        "--normalize)")
    loud = audio.first_play_warning(info)
    if loud:
        warnings.append(loud)

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
        "audio": {"full_scale_volts": opts.full_scale_volts, **info},
        "settle_seconds": opts.settle,
        "overrides": list(getattr(patch, "overrides", ())),
        "solver": {"name": trace.solver, **trace.counters},
    }
    result = Rendered(report=report, times=times, signals=values, listen=listen_fine,
                      sample_rate_hz=fine_rate, audio_volts=listen_audio)
    if not write:
        return result
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    base = out / patch.name
    wav = base.with_suffix(".wav")
    audio.write_wav(wav, samples, opts.rate_hz)
    png = Path(f"{base}.png")
    span = PLOT_NO_PITCH_SECONDS
    if listen_report["freq_hz"]:
        span = max(PLOT_MIN_SECONDS, PLOT_PERIODS / listen_report["freq_hz"])
    shown = times < times[0] + span
    title = f"{patch.name}: {_pitch_text(listen_report)} at {listen_label(patch)}"
    subtitle = (f"supply {patch.supply.values['volts']:g} V, {supply['mean_ma']:.2f} mA mean; "
                f"from {opts.settle * 1e3:g} ms after power-on")
    plots.waveform_plot(png, times[shown] - opts.settle,
                        {net: values[net][shown] for net in patch.probes} or
                        {listen_label(patch): listen_fine[shown]}, title, subtitle)
    spectrum = Path(f"{base}.spectrum.png")
    plots.spectrum_plot(spectrum, listen_audio, opts.rate_hz, listen_report["freq_hz"],
                        f"{patch.name}: spectrum at {listen_label(patch)}, {_pitch_text(listen_report)}")
    js = Path(f"{base}.json")
    write_json(js, report)
    result.paths = [wav, png, spectrum, js]
    return result


def _pitch_text(m: dict) -> str:
    if not m.get("freq_hz"):
        return "no steady pitch"
    return f"{m['freq_hz']:.2f} Hz = {m['note']} {m['cents']:+.1f} cents"
