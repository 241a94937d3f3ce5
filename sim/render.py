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

from sim import audio, measure, plots
from sim.compile import Circuit, compile_patch
from sim.errors import UsageError
from sim.fileio import write_json
from sim.simulate import StepOptions, simulate, simulate_reference

#: Samples per audio sample in the simulated signal before the anti-alias filter and
#: decimation. 4 x 48 kHz = 192 kHz puts the first alias of a square's harmonics far
#: above the filter's stop band.
OVERSAMPLE = 4

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


def listen_signal(patch, circuit: Circuit, values: dict[str, np.ndarray]) -> np.ndarray:
    nets = patch.listen.nets
    if patch.listen.part is not None:
        raise UsageError(f"listening to the current of {patch.listen.part} is not supported yet; "
                         "listen to a net or a pair of nets")
    sig = values[nets[0]].copy()
    if len(nets) == 2:
        sig -= values[nets[1]]
    return sig


def listen_label(patch) -> str:
    return patch.listen.nets[0] if len(patch.listen.nets) == 1 else " - ".join(patch.listen.nets)


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

    record = list(dict.fromkeys([*patch.probes, *patch.listen.nets, "vdd"]))
    circuit, trace = simulate_patch(patch, opts, record)
    fine_rate = opts.rate_hz * OVERSAMPLE
    times, y = trace.uniform(fine_rate, opts.settle, opts.settle + opts.seconds)
    values = {name: y[:, j] for j, name in enumerate(record)}
    warnings = supply_warnings(float(patch.supply.values["volts"]))

    probes = {net: measure.measure_signal(values[net], fine_rate) for net in patch.probes}
    listen_fine = listen_signal(patch, circuit, values)
    listen_report = measure.measure_signal(listen_fine, fine_rate)
    amps = supply_amps(times, values["vdd"], patch.supply.values)
    supply = {"mean_ma": float(np.mean(amps) * 1e3), "peak_ma": float(np.max(amps) * 1e3),
              "volts_min": float(np.min(values["vdd"]))}

    listen_audio = audio.decimate(listen_fine, OVERSAMPLE)
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
        "supply": supply,
        "warnings": warnings,
        "audio": {"full_scale_volts": opts.full_scale_volts, **info},
        "settle_seconds": opts.settle,
        "overrides": list(getattr(patch, "overrides", ())),
        "solver": {"name": trace.solver, **trace.counters},
    }
    result = Rendered(report=report, times=times, signals=values, listen=listen_fine,
                      sample_rate_hz=fine_rate)
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
