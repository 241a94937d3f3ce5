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


def main() -> None:
    t = time.perf_counter()
    kernel.load()
    print(f"kernel load (compile, or its disk cache): {time.perf_counter() - t:.2f} s")
    for name, net in SCENARIOS.items():
        circuit = compile_patch(load_patch(ROOT / "scenarios" / f"{name}.yaml"))
        for quality, rtol in (("default", StepOptions.rtol), ("draft", 1e-3)):
            opts = StepOptions(rtol=rtol, atol_volts=rtol / 10)
            simulate(circuit, 0.01, [net], opts)  # warm-up
            t = time.perf_counter()
            trace = simulate(circuit, AUDIO_SECONDS, [net], opts)
            wall = time.perf_counter() - t
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
                  f"({wall:.2f} s for {AUDIO_SECONDS:g} s)  pitch {ours:.4f} Hz, "
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
    print(f"alias floor of a square-wave render (tri-square listening at sq, 48 kHz WAV path): "
          f"{floor:.1f} dB")
    with tempfile.TemporaryDirectory() as out:
        cmd = [str(Path(sys.executable).with_name("halfrail")), "render",
               str(ROOT / "scenarios" / "tri-square.yaml"), "--seconds", "10", "--out", out,
               "--quiet"]
        subprocess.run(cmd, check=True, capture_output=True)  # warm the cache
        t = time.perf_counter()
        subprocess.run(cmd, check=True, capture_output=True)
        print(f"whole `halfrail render tri-square --seconds 10` (cache warm): "
              f"{time.perf_counter() - t:.2f} s")


if __name__ == "__main__":
    os.environ.setdefault("PYTHONHASHSEED", "0")
    main()
