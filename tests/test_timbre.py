"""Timbre of the demo oscillators against the Fourier series of the ideal waveforms, and
the rendered WAV's pitch against an independent estimator."""

from pathlib import Path

import numpy as np
import pytest
import soundfile

from sim.patch import load_patch
from sim.render import RenderOptions, render

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
OPTS = RenderOptions(seconds=0.4, settle=0.1, progress=False)


def db(ratio):
    return 20 * np.log10(ratio)


@pytest.fixture(scope="module")
def oscillator():
    return render(load_patch(SCENARIOS / "tri-square.yaml"), write=False, opts=OPTS).report


@pytest.fixture(scope="module")
def sawtooth():
    return render(load_patch(SCENARIOS / "saw.yaml"), write=False, opts=OPTS).report


@pytest.mark.parametrize("n", [3, 5, 7])
def test_the_square_has_odd_harmonics_near_one_over_n(oscillator, n):
    # source: Fourier series of a square wave (any signals textbook): b_n = 4/(n pi), odd n.
    # Tolerance 1 dB: the real square has finite edges and a duty of 0.49, not 0.5.
    level = oscillator["probes"]["sq"]["harmonics_db"][n - 1]
    assert level == pytest.approx(db(1 / n), abs=1.0)


@pytest.mark.parametrize("n", [2, 4, 6])
def test_the_square_has_even_harmonics_far_below_the_odd_ones(oscillator, n):
    # source: Fourier series of a pulse wave: |sin(n pi d)| / n; at the measured duty of
    # about 0.49 the even harmonics are near -30 dB, for a perfect 0.5 they vanish.
    assert oscillator["probes"]["sq"]["harmonics_db"][n - 1] < -20.0


@pytest.mark.parametrize("n", [3, 5])
def test_the_triangle_has_odd_harmonics_near_one_over_n_squared(oscillator, n):
    # source: Fourier series of a triangle wave (any signals textbook): 8/(pi^2 n^2), odd n.
    # Tolerance 1.5 dB: the ramps bend slightly (finite integrator gain) and the turns
    # round over the flips.
    level = oscillator["probes"]["tri"]["harmonics_db"][n - 1]
    assert level == pytest.approx(db(1 / n ** 2), abs=1.5)


def test_the_triangle_has_no_strong_even_harmonics(oscillator):
    # source: Fourier series of a symmetric triangle: even harmonics are zero.
    assert oscillator["probes"]["tri"]["harmonics_db"][1] < -25.0


@pytest.mark.parametrize("n", [2, 3])
def test_the_sawtooth_has_strong_harmonics_of_every_order(sawtooth, n):
    # source: Fourier series of a sawtooth (any signals textbook): 2/(n pi), every n, so
    # the 2nd is -6 dB and the 3rd -9.5 dB. Ours falls in a short but finite time, which
    # rounds off the series; "strong" here is within 6 dB of the ideal.
    level = sawtooth["probes"]["saw"]["harmonics_db"][n - 1]
    assert level > db(1 / n) - 6.0


def test_the_rendered_wav_has_the_reported_pitch_by_an_independent_estimator(tmp_path):
    # An independent check: librosa's pYIN (probabilistic YIN, Mauch & Dixon 2014) on the
    # WAV as written, read back with soundfile, against the report. 5 cents: pYIN reports
    # frequencies on a grid, here of 5 cents (resolution=0.05), so up to 2.5 cents of the
    # difference is the grid itself (a finer grid costs tens of seconds).
    import librosa  # a test dependency (pyproject.toml [test]); imported here, it is slow
    result = render(load_patch(SCENARIOS / "tri-square.yaml"), tmp_path, OPTS)
    samples, rate = soundfile.read(tmp_path / "tri-square.wav")
    f0, voiced, _ = librosa.pyin(samples, fmin=100.0, fmax=1600.0, sr=rate, frame_length=4096,
                                 resolution=0.05)
    estimate = float(np.median(f0[voiced]))
    reported = result.report["listen"]["freq_hz"]
    assert abs(1200 * np.log2(estimate / reported)) < 5.0
