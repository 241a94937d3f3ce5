"""Measures of a sampled node voltage: pitch, levels, duty, harmonics, THD."""

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.signal import chirp

from sim.measure import MEASURE_KEYS, duty_cycle, find_pitch, measure_signal, pitch_track
from sim.notes import note_of

RATE_HZ = 192000.0
NOISE_VOLTS = 0.005        # small added noise: 46 dB below a 1 V amplitude tone
START_PHASE = 0.237        # cycles; any phase that does not start on a crossing


def phase_of(freq_hz, seconds, rate_hz=RATE_HZ, start=START_PHASE):
    t = np.arange(int(round(seconds * rate_hz))) / rate_hz
    return (freq_hz * t + start) % 1.0


def ideal(wave, phase):
    """Ideal waveforms of amplitude 1 V sampled at the given phases (cycles)."""
    if wave == "sine":
        return np.sin(2 * np.pi * phase)
    if wave == "square":
        return np.where(phase < 0.5, 1.0, -1.0)
    if wave == "triangle":
        return 1.0 - 4.0 * np.abs(phase - 0.5)
    if wave == "sawtooth":
        return 2.0 * phase - 1.0
    if wave == "harmonic_sum":
        return (np.sin(2 * np.pi * phase) + 0.5 * np.sin(4 * np.pi * phase + 1.0)
                + 0.3 * np.sin(6 * np.pi * phase + 2.0))
    raise AssertionError(wave)


def noisy(x, volts=NOISE_VOLTS, seed=7):
    return x + volts * np.random.default_rng(seed).standard_normal(x.size)


def cents_off(measured_hz, true_hz):
    return 1200.0 * math.log2(measured_hz / true_hz)


WAVES = ["sine", "square", "triangle", "sawtooth", "harmonic_sum"]
FREQS_HZ = [30.0, 55.3, 261.6, 1234.5, 3001.0, 5000.0]


@pytest.mark.parametrize("wave", WAVES)
@pytest.mark.parametrize("freq_hz", FREQS_HZ)
def test_steady_tone_pitch_is_within_a_tenth_of_a_cent(wave, freq_hz):
    m = measure_signal(noisy(ideal(wave, phase_of(freq_hz, 0.5))), RATE_HZ)
    assert abs(cents_off(m["freq_hz"], freq_hz)) < 0.1     # design target: 0.1 cent


@pytest.mark.parametrize("freq_hz", [30.0, 440.0, 5000.0])
def test_a_short_record_of_a_low_tone_still_gets_its_pitch(freq_hz):
    m = measure_signal(noisy(ideal("sine", phase_of(freq_hz, 0.2))), RATE_HZ)
    assert abs(cents_off(m["freq_hz"], freq_hz)) < 0.1


def test_a_tone_crossing_its_mid_level_three_times_per_period_reports_the_fundamental():
    freq_hz = 200.0
    phase = phase_of(freq_hz, 0.3)
    x = np.sin(2 * np.pi * phase) + 1.5 * np.sin(6 * np.pi * phase)
    mid = 0.5 * (x.max() + x.min())
    rising = np.count_nonzero((x[:-1] <= mid) & (x[1:] > mid))
    assert rising / (0.3 * freq_hz) == pytest.approx(3.0, abs=0.1)   # the premise
    m = measure_signal(noisy(x), RATE_HZ)
    assert abs(cents_off(m["freq_hz"], freq_hz)) < 0.1


def test_a_tone_with_a_strong_second_harmonic_is_not_read_an_octave_up():
    phase = phase_of(330.0, 0.3)
    x = 0.4 * np.sin(2 * np.pi * phase) + np.sin(4 * np.pi * phase + 0.3)
    m = measure_signal(noisy(x), RATE_HZ)
    assert abs(cents_off(m["freq_hz"], 330.0)) < 0.1


def test_note_and_cents_follow_the_measured_frequency():
    freq_hz = 440.0 * 2.0 ** (-17.0 / 1200.0)
    m = measure_signal(ideal("square", phase_of(freq_hz, 0.3)), RATE_HZ)
    assert (m["note"], m["cents"]) == (note_of(m["freq_hz"])[0], note_of(m["freq_hz"])[1])
    assert m["note"] == "A4"
    assert m["cents"] == pytest.approx(-17.0, abs=0.1)


def test_the_report_has_exactly_the_documented_keys():
    m = measure_signal(ideal("sine", phase_of(100.0, 0.1)), RATE_HZ)
    assert tuple(m) == MEASURE_KEYS
    assert set(m) == {"freq_hz", "note", "cents", "vmin", "vmax", "vpp", "mean", "rms", "duty",
                      "harmonics_db", "thd_pct"}


def test_levels_of_a_sine_on_a_dc_offset():
    x = 4.5 + 2.0 * ideal("sine", phase_of(1000.0, 0.25, start=0.0))
    m = measure_signal(x, RATE_HZ)
    assert m["vmin"] == pytest.approx(2.5, abs=1e-3)
    assert m["vmax"] == pytest.approx(6.5, abs=1e-3)
    assert m["vpp"] == pytest.approx(4.0, abs=2e-3)
    assert m["mean"] == pytest.approx(4.5, abs=1e-9)
    assert m["rms"] == pytest.approx(2.0 / math.sqrt(2.0), rel=1e-6)  # common practice: A/sqrt(2)


def odd_only(levels):
    return [levels[n - 1] for n in range(1, 11) if n % 2]


def even_only(levels):
    return [levels[n - 1] for n in range(2, 11, 2)]


@pytest.mark.parametrize("wave, amplitude_of_harmonic, odd_harmonics_only", [
    # source: any signals textbook, Fourier series of standard waveforms:
    # square (4/pi) sum sin(n w t)/n over odd n; triangle (8/pi^2) sum +-sin(n w t)/n^2
    # over odd n; sawtooth (2/pi) sum (-1)^(n+1) sin(n w t)/n over all n
    ("square", lambda n: 1.0 / n, True),
    ("triangle", lambda n: 1.0 / n ** 2, True),
    ("sawtooth", lambda n: 1.0 / n, False),
])
def test_harmonic_levels_of_ideal_waveforms_match_their_fourier_series(
        wave, amplitude_of_harmonic, odd_harmonics_only):
    m = measure_signal(ideal(wave, phase_of(110.0, 0.5)), RATE_HZ)
    expected = [20.0 * math.log10(amplitude_of_harmonic(n)) for n in range(1, 11)]
    levels = m["harmonics_db"]
    assert len(levels) == 10 and levels[0] == 0.0
    if odd_harmonics_only:
        assert odd_only(levels) == pytest.approx(odd_only(expected), abs=0.05)
        assert max(even_only(levels)) < -60.0
    else:
        assert levels == pytest.approx(expected, abs=0.05)


def test_thd_of_a_tone_with_known_added_harmonics_follows_the_definition():
    phase = phase_of(523.0, 0.4)
    added = {2: 0.1, 3: 0.05, 5: 0.02, 10: 0.01}
    x = 2.0 * np.sin(2 * np.pi * phase)
    for n, relative in added.items():
        x = x + 2.0 * relative * np.sin(2 * np.pi * n * phase + 0.3 * n)
    m = measure_signal(x, RATE_HZ)
    # source: THD definition, 100 * sqrt(sum_{k>=2} A_k^2) / A_1 (IEEE Std 1057 wording)
    expected_pct = 100.0 * math.sqrt(sum(r * r for r in added.values()))
    assert m["thd_pct"] == pytest.approx(expected_pct, rel=1e-4)
    assert m["harmonics_db"][1] == pytest.approx(20.0 * math.log10(0.1), abs=0.01)
    assert m["harmonics_db"][9] == pytest.approx(20.0 * math.log10(0.01), abs=0.01)


def test_a_pure_sine_has_almost_no_distortion():
    m = measure_signal(ideal("sine", phase_of(777.0, 0.3)), RATE_HZ)
    assert m["thd_pct"] < 1e-4
    assert max(m["harmonics_db"][1:]) < -120.0


def test_harmonics_above_nyquist_are_left_out():
    rate_hz = 48000.0
    m = measure_signal(ideal("triangle", phase_of(5000.0, 0.2, rate_hz)), rate_hz)
    assert m["harmonics_db"][3] is not None            # 20 kHz, below 24 kHz
    assert m["harmonics_db"][4:] == [None] * 6          # 25 kHz and up


@pytest.mark.parametrize("freq_hz", [97.3, 1234.5])
def test_duty_of_a_30_percent_pulse_wave(freq_hz):
    x = np.where(phase_of(freq_hz, 0.5) < 0.3, 9.0, 0.0)
    assert measure_signal(x, RATE_HZ)["duty"] == pytest.approx(0.30, abs=0.001)


def test_duty_of_a_sine_is_one_half():
    assert measure_signal(ideal("sine", phase_of(440.0, 0.3)), RATE_HZ)["duty"] == \
        pytest.approx(0.5, abs=1e-4)


def assert_no_pitch(m):
    assert (m["freq_hz"], m["note"], m["cents"], m["duty"]) == (None, None, None, None)
    assert m["harmonics_db"] is None and m["thd_pct"] is None


@pytest.mark.parametrize("sweep_percent", [1.0, 3.0, 10.0])
def test_a_drifting_chirp_has_no_pitch(sweep_percent):
    t = np.arange(int(0.5 * RATE_HZ)) / RATE_HZ
    x = chirp(t, f0=440.0, t1=0.5, f1=440.0 * (1 + sweep_percent / 100.0))
    assert_no_pitch(measure_signal(x, RATE_HZ))


def test_white_noise_has_no_pitch():
    x = np.random.default_rng(3).standard_normal(int(0.3 * RATE_HZ))
    m = measure_signal(x, RATE_HZ)
    assert_no_pitch(m)
    assert m["rms"] == pytest.approx(1.0, rel=0.01)


def test_a_chaotic_signal_has_no_pitch():
    # The Lorenz system (sigma 10, rho 28, beta 8/3) in its chaotic regime, one unit
    # of its time played as 4 ms so its loops fall in the audio range.
    def lorenz(_, s):
        return [10.0 * (s[1] - s[0]), s[0] * (28.0 - s[2]) - s[1], s[0] * s[1] - 8.0 / 3.0 * s[2]]
    units = np.linspace(10.0, 110.0, int(0.4 * RATE_HZ))
    solution = solve_ivp(lorenz, (0.0, 110.0), [1.0, 1.0, 1.0], t_eval=units, rtol=1e-6,
                         atol=1e-6)
    assert_no_pitch(measure_signal(solution.y[0], RATE_HZ))


def test_fewer_than_three_periods_have_no_pitch():
    assert_no_pitch(measure_signal(ideal("sine", phase_of(100.0, 0.025)), RATE_HZ))


def test_a_tone_that_stops_half_way_has_no_pitch():
    x = ideal("sine", phase_of(440.0, 0.4))
    x[x.size // 2:] = 0.0
    assert_no_pitch(measure_signal(x, RATE_HZ))


def test_a_constant_voltage_has_levels_but_no_pitch():
    m = measure_signal(np.full(1000, 3.3), RATE_HZ)
    assert_no_pitch(m)
    assert (m["vmin"], m["vmax"], m["vpp"]) == (3.3, 3.3, 0.0)
    assert m["mean"] == pytest.approx(3.3, abs=1e-12)
    assert m["rms"] == pytest.approx(0.0, abs=1e-12)


def test_a_slow_steady_oscillation_below_the_audio_band_is_still_measured():
    pitch = find_pitch(ideal("triangle", phase_of(2.5, 2.0, 48000.0)), 48000.0)
    assert abs(cents_off(pitch.freq_hz, 2.5)) < 0.1


@pytest.mark.parametrize("bad", [np.array([]), np.zeros((4, 4)), np.array([1.0, np.nan, 2.0])])
def test_malformed_input_is_rejected(bad):
    with pytest.raises(ValueError):
        measure_signal(bad, RATE_HZ)


def test_pitch_track_follows_a_step_in_pitch_and_marks_unsteady_windows():
    first = ideal("square", phase_of(220.0, 0.2))
    second = ideal("square", phase_of(330.0, 0.2))
    times_s, freqs_hz = pitch_track(np.concatenate([first, second]), RATE_HZ, 0.05)
    assert times_s.shape == freqs_hz.shape
    assert np.all(np.diff(times_s) == pytest.approx(0.025))
    assert times_s[0] == pytest.approx(0.025, abs=1e-5)
    half_window, step_s, slack = 0.025, 0.2, 1e-4
    before = times_s + half_window <= step_s + slack     # window wholly before the step
    after = times_s - half_window >= step_s - slack      # window wholly after it
    assert np.allclose(freqs_hz[before], 220.0, rtol=1e-4)
    assert np.allclose(freqs_hz[after], 330.0, rtol=1e-4)
    straddling = ~before & ~after
    assert np.count_nonzero(straddling) == 1
    assert np.all(np.isnan(freqs_hz[straddling]))


def test_pitch_track_of_noise_is_all_nan():
    x = np.random.default_rng(5).standard_normal(int(0.2 * RATE_HZ))
    _, freqs_hz = pitch_track(x, RATE_HZ, 0.05)
    assert freqs_hz.size == 7 and np.all(np.isnan(freqs_hz))


@pytest.mark.parametrize("volts", [[0.0, 1.0, 1.0, 0.0], [0.5, 0.5, 1.0, 0.5]])
def test_duty_counts_the_time_above_mid_on_straight_lines_between_samples(volts):
    # Worked by hand (common practice, straight lines between samples): 0 -> 1 -> 1 -> 0
    # is above 0.5 for half of the first gap, all of the second and half of the third;
    # 0.5 -> 0.5 -> 1 -> 0.5 rests on the level (not above) for the first gap, then is
    # above for the other two: 2 of 3 samples' time either way.
    assert duty_cycle(np.array(volts), 0.5, 0.0, 3.0) == pytest.approx(2.0 / 3.0, abs=1e-15)


def test_the_schmitt_events_are_the_first_samples_above_after_one_below():
    # common practice (a Schmitt trigger's definition), written out with whole arrays:
    # each sample's state (+1 above high, -1 below low), and an event where a +1 follows
    # a -1 among the samples that have one
    from sim.measure import _rising_events

    rng = np.random.default_rng(8)
    for size in (2, 50, 20_000):
        x = np.cumsum(rng.standard_normal(size))
        low, high = np.percentile(x, 40), np.percentile(x, 60)
        state = np.zeros(x.size, dtype=np.int8)
        state[x > high] = 1
        state[x < low] = -1
        where = np.flatnonzero(state)
        levels = state[where]
        expected = where[1:][(levels[1:] == 1) & (levels[:-1] == -1)]
        assert np.array_equal(_rising_events(x, low, high), expected), size
