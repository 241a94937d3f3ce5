"""Performance figures of halfrail (printed, never asserted). Run with `make bench`.

For each scenario: compile time (kernel from its disk cache vs. cold is reported by the
first call), the real-time factor of the compiled stepper over 10 s of audio (simulated
seconds per wall second, one process, one core), its work counters, and the pitch error
against scipy's Radau on the same equations over a short window. Then the wall time of a
whole `halfrail render` of 10 s (WAV, plots and report), cache warm.
"""

from __future__ import annotations

import dataclasses
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from sim import kernel  # noqa: E402
from sim.compile import compile_patch  # noqa: E402
from sim.measure import measure_signal  # noqa: E402
from sim.patch import load_patch  # noqa: E402
from sim.render import OVERSAMPLE, RenderOptions, render  # noqa: E402
from sim.simulate import StepOptions, simulate, simulate_reference  # noqa: E402

AUDIO_SECONDS = 10.0
#: Window of the reference comparison (s): short, Radau at rtol 1e-8 needs minutes per second.
REFERENCE_FROM, REFERENCE_TO = 0.02, 0.08
RATE = 48000 * OVERSAMPLE
SCENARIOS = {"tri-square": "sq", "mixer": "sqa", "saw": "sq"}


def alias_floor_db(samples, rate_hz, f0_hz, half_width_hz=8.0):
    """Energy between the harmonics of f0 over the total (DC excluded), dB.

    Blackman-Harris window (sidelobes below -92 dB); every bin within half_width_hz of a
    harmonic counts as harmonic. A perfectly periodic, alias-free render gives the
    window's floor; aliases of a square's harmonics land between the harmonics.
    """
    from scipy.signal import windows

    x = np.asarray(samples, float) - np.mean(samples)
    spec = np.abs(np.fft.rfft(x * windows.blackmanharris(x.size))) ** 2
    freqs = np.fft.rfftfreq(x.size, 1.0 / rate_hz)
    near = freqs < half_width_hz
    for n in range(1, int(freqs[-1] / f0_hz) + 1):
        near |= np.abs(freqs - n * f0_hz) <= half_width_hz
    return 10 * np.log10(spec[~near].sum() / spec[1:].sum())


def pitch(trace, net, t0, t1):
    _, y = trace.uniform(RATE, t0, t1)
    return measure_signal(y[:, trace.names.index(net)], RATE)["freq_hz"]


#: Each real-time factor is the best of this many runs (the machine's other load only
#: ever slows a run down), printed with their median. Five rather than three: on this
#: 2-core machine a run of 0.5 s is often slowed by a third by a blip of other load that
#: a few seconds later is gone (three runs of the oscillator gave 18.4x in a bench whose
#: machine-speed lines were at their fastest, while its draft quality ran at 24.9x).
RUNS = 5
#: Whole renders are short and their wall time varies more from run to run (start-up,
#: threads): best and median of this many.
RENDER_RUNS = 5


def machine_speed() -> str:
    """How fast this machine runs right now, to read the figures beside: a compiled loop
    (the inverter's channel law at 2 million fixed operating points, ns per evaluation)
    and a plain Python loop (ns per turn). On this 2-core machine both vary by a third
    or more within an hour (other tenants), and the figures below move with them."""
    import numba

    from blocks._junction import channel

    @numba.njit
    def channels(vgs):
        total = 0.0
        for v in vgs:
            total += channel(v, 9.0 - v, 0.55e-3, 1.3, 0.05, 0.0776)[0]
        return total

    vgs = np.linspace(0.0, 9.0, 2_000_000)
    channels(vgs[:10])
    compiled = python = math.inf
    for _ in range(RUNS):
        t = time.perf_counter()
        channels(vgs)
        compiled = min(compiled, (time.perf_counter() - t) / vgs.size)
        t = time.perf_counter()
        total = 0
        for i in range(1_000_000):
            total += i * i
        python = min(python, (time.perf_counter() - t) / 1_000_000)
    return (f"machine speed now: compiled channel law {compiled * 1e9:.1f} ns per evaluation, "
            f"Python loop {python * 1e9:.0f} ns per turn (lower is faster)")


def main() -> None:
    print(machine_speed())
    t = time.perf_counter()
    kernel.load()
    first = compile_patch(load_patch(ROOT / "scenarios" / "tri-square.yaml"))
    simulate(first, 1e-3, ["vdd"])
    print(f"kernel load and first call (compile, or numba's disk cache): "
          f"{time.perf_counter() - t:.2f} s")
    for name, net in SCENARIOS.items():
        circuit = compile_patch(load_patch(ROOT / "scenarios" / f"{name}.yaml"))
        for quality, rtol in (("default", StepOptions.rtol), ("draft", 1e-3)):
            opts = StepOptions(rtol=rtol, atol_volts=rtol / 10)
            simulate(circuit, 0.01, [net], opts)  # warm-up
            walls = []
            for _ in range(RUNS):
                t = time.perf_counter()
                trace = simulate(circuit, AUDIO_SECONDS, [net], opts)
                walls.append(time.perf_counter() - t)
            wall, typical = min(walls), float(np.median(walls))
            short = simulate(circuit, REFERENCE_TO, [net], opts)
            ours = pitch(short, net, REFERENCE_FROM, REFERENCE_TO)
            if quality == "default":
                t = time.perf_counter()
                ref = simulate_reference(circuit, REFERENCE_TO, [net], rtol=1e-8, atol_volts=1e-8)
                ref_wall = time.perf_counter() - t
                theirs = pitch(ref, net, REFERENCE_FROM, REFERENCE_TO)
            cents = 1200 * math.log2(ours / theirs)
            c = trace.counters
            print(f"{name:11s} {quality:8s} real-time x{AUDIO_SECONDS / wall:6.2f}  "
                  f"(best of {RUNS}: {wall:.2f} s for {AUDIO_SECONDS:g} s; median x"
                  f"{AUDIO_SECONDS / typical:.2f})  pitch {ours:.4f} Hz, "
                  f"{cents:+.3f} cent vs Radau  | steps {c['steps']}, rejected "
                  f"{c['rejected_error'] + c['rejected_newton']}, Newton iterations "
                  f"{c['newton_iterations']}")
        span = REFERENCE_TO
        print(f"{'':11s} reference Radau rtol 1e-8: {ref_wall:.1f} s for {span:g} s "
              f"(x{span / ref_wall:.4f} real time; compiled default is "
              f"{(AUDIO_SECONDS / wall) / (span / ref_wall):.0f} times faster)")
    patch = load_patch(ROOT / "scenarios" / "tri-square.yaml")
    square = dataclasses.replace(patch, listen=dataclasses.replace(patch.listen, nets=("sq",)))
    result = render(square, write=False, opts=RenderOptions(seconds=2.0, progress=False))
    trim = int(0.1 * 48000)  # leave out the fades
    floor = alias_floor_db(result.audio_volts[trim:-trim], 48000, result.report["listen"]["freq_hz"])
    print(machine_speed())
    print(f"alias floor of a square-wave render (tri-square listening at sq, 48 kHz WAV path): "
          f"{floor:.1f} dB")
    with tempfile.TemporaryDirectory() as out:
        def command(seconds: str) -> list[str]:
            return [str(Path(sys.executable).with_name("halfrail")), "render",
                    str(ROOT / "scenarios" / "tri-square.yaml"), "--seconds", seconds,
                    "--out", out, "--quiet"]

        subprocess.run(command("10"), check=True, capture_output=True)  # warm the cache
        walls: dict[str, list[float]] = {"10": [], "0.01": []}
        for _ in range(RENDER_RUNS):  # interleaved: the machine's load drifts
            for seconds, runs in walls.items():
                t = time.perf_counter()
                subprocess.run(command(seconds), check=True, capture_output=True)
                runs.append(time.perf_counter() - t)
        for seconds, runs in walls.items():
            what = "" if seconds == "10" else " (start-up, kernel load, files: the fixed cost)"
            print(f"whole `halfrail render tri-square --seconds {seconds}` (cache warm){what}: "
                  f"best of {RENDER_RUNS} {min(runs):.2f} s, median "
                  f"{sorted(runs)[len(runs) // 2]:.2f} s")
    sweep_figures()
    spread_and_tune_figures()


#: tri-square.yaml with R3 replaced by a 20k pot as a variable resistor in series with 90k.
POT_OSCILLATOR = (ROOT / "scenarios" / "tri-square.yaml").read_text().replace(
    "R3:  {kind: resistor, between: [sq, sum], value: 100k}",
    "RV1: {kind: pot, ends: [sq, arm], wiper: arm, value: 20k}\n"
    "  R3:  {kind: resistor, between: [arm, sum], value: 90k}")


def sweep_figures() -> None:
    """Stepped sweep wall times (command and library, 1 and 2 workers), the moving pot
    against the stepped curve, and the oscillator's drift with the supply."""
    from scipy.interpolate import PchipInterpolator

    from sim.measure import pitch_track
    from sim.render import Move
    from sim.sweep import STEP_SECONDS, sweep

    oscillator = ROOT / "scenarios" / "tri-square.yaml"
    with tempfile.TemporaryDirectory() as out:
        cmd = [str(Path(sys.executable).with_name("halfrail")), "sweep", str(oscillator),
               "R3.value", "50k:200k:11", "--log", "--out", out, "--quiet"]
        t = time.perf_counter()
        subprocess.run(cmd, check=True, capture_output=True)
        print(f"whole `halfrail sweep tri-square R3.value 50k:200k:11 --log` ({STEP_SECONDS:g} s "
              f"per step, {os.cpu_count()} workers, WAV, plot, start-up included): "
              f"{time.perf_counter() - t:.2f} s")
    for seconds, workers in ((STEP_SECONDS, 1), (STEP_SECONDS, 2), (1.0, 2)):
        swept = sweep(oscillator, "R3.value", "50k:200k:11", log=True, workers=workers,
                      opts=RenderOptions(seconds=seconds, progress=False), progress=False,
                      write=False)
        print(f"sweep library call, 11 steps of {seconds:g} s, {workers} worker(s): "
              f"{swept.wall_seconds:.2f} s")
    drift = sweep(oscillator, "supply.volts", "9:5:9", opts=RenderOptions(seconds=0.5,
                  progress=False), progress=False, write=False).report
    currents = [p["supply_ma"] for p in drift["points"]]
    print(f"tri-square pitch drift with the supply (9 V to 5 V, 9 steps): "
          f"{drift['drift']['cents_per_volt']:+.1f} cents per volt; supply current "
          f"{currents[0]:.2f} mA at 9 V, {currents[-1]:.2f} mA at 5 V")
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "pot-square.yaml"
        path.write_text(POT_OSCILLATOR)
        points = sweep(path, "RV1.position", "0:1:11", opts=RenderOptions(seconds=0.3,
                       progress=False), progress=False, write=False).report["points"]
        curve = PchipInterpolator([p["value"] for p in points],
                                  np.log2([p["freq_hz"] for p in points]))
        move_seconds = 4.0
        opts = RenderOptions(seconds=move_seconds, progress=False,
                             moves=(Move("RV1", "position", "0", "1"),))
        t = time.perf_counter()
        moving = render(load_patch(path), write=False, opts=opts)
        wall = time.perf_counter() - t
    for window in (0.01, 0.02, 0.05):
        times, freqs = pitch_track(moving.listen, moving.sample_rate_hz, window)
        ok = np.isfinite(freqs)
        cents = 1200 * (np.log2(freqs[ok]) - curve(times[ok] / move_seconds))
        worst = f"{np.max(np.abs(cents)):.2f}" if ok.any() else "-"
        print(f"moving pot 0 to 1 over {move_seconds:g} s ({wall:.1f} s wall) vs the 11-step "
              f"sweep, {window * 1e3:g} ms windows: {ok.sum()}/{ok.size} tracked, largest "
              f"difference {worst} cents")


#: The spread figure: this many builds of 1 s renders of the oscillator (target: under
#: 60 s on a 2-core machine).
SPREAD_RUNS = 200


def spread_and_tune_figures() -> None:
    """Wall time of a 200-build spread of 1 s renders (its numbers too), of the
    sensitivity renders, and of tuning R3 to A3 (1 s renders), with their results."""
    from sim.spread import ranked_sensitivity, spread
    from sim.tune import target_hz, tune

    patch = load_patch(ROOT / "scenarios" / "tri-square.yaml")
    opts = RenderOptions(progress=False)
    result = spread(patch, runs=SPREAD_RUNS, opts=opts, sensitivity=False, progress=False)
    c = result.report["cents"]
    print(f"spread tri-square, {SPREAD_RUNS} builds of {opts.seconds:g} s renders "
          f"({os.cpu_count()} workers, {result.renders} renders): "
          f"{result.wall_seconds:.1f} s (target under 60 s); median {c['median']:+.1f} cents, "
          f"5 % {c['p5']:+.1f}, 95 % {c['p95']:+.1f}, "
          f"{result.report['within']['fraction']:.0%} within "
          f"+-{result.report['within']['window_cents']:g} cents")
    sens = spread(patch, runs=1, opts=opts, progress=False)
    top = ", ".join(f"{key} {slope:+.2f}" for key, slope, _ in ranked_sensitivity(sens)[:6])
    print(f"sensitivity renders ({sens.renders - 2} renders of {opts.seconds:g} s): "
          f"{sens.wall_seconds:.1f} s; cents per %: {top}")
    result = tune(patch, "R3", target_hz(note="A3"), opts=opts, progress=False)
    tuned, best = result.report, result.report["candidates"][0]
    print(f"tune tri-square R3 to A3 ({tuned['renders']} renders of {opts.seconds:g} s): "
          f"{result.wall_seconds:.1f} s; "
          f"exact {tuned['exact_value'] / 1e3:.2f} k ({tuned['exact_cents']:+.3f} cents); best "
          f"{best['label']} {best['cents']:+.2f} cents")


if __name__ == "__main__":
    os.environ.setdefault("PYTHONHASHSEED", "0")
    main()
