"""Audio rendering, atomic file writing and plots."""

import io
import json
import math
import struct

import numpy as np
import pytest
import soundfile
from PIL import Image

from sim.audio import (LOUD_RMS_DBFS, PASSBAND_FRACTION, STOPBAND_ATTENUATION_DB,
                       antialias_taps, clip_to_full_scale, decimate, fft_length,
                       first_play_warning, kaiser_lowpass_taps, remove_dc, to_wav_samples,
                       write_wav)
from sim import plots
from sim.fileio import atomic_path, write_json, write_text
from sim.plots import spectrum_plot, waveform_plot

SIM_RATE_HZ = 192000
AUDIO_RATE_HZ = 48000
FACTOR = SIM_RATE_HZ // AUDIO_RATE_HZ


def sine(freq_hz, seconds, rate_hz, amplitude=1.0, phase=0.3):
    t = np.arange(int(round(seconds * rate_hz))) / rate_hz
    return amplitude * np.sin(2 * np.pi * freq_hz * t + phase)


def steady_level_db(x, edge=2000):
    """Amplitude in dB re 1 of a steady sine, away from the record's ends."""
    middle = x[edge:-edge]
    return 20.0 * math.log10(math.sqrt(2.0 * np.mean(middle ** 2)))


def test_decimation_attenuates_a_30_khz_tone_by_more_than_60_db():
    y = decimate(sine(30000.0, 0.5, SIM_RATE_HZ), FACTOR)
    assert steady_level_db(y) < -60.0          # design target: no audible alias of 30 kHz


@pytest.mark.parametrize("freq_hz", [1000.0, 10000.0, 20000.0])
def test_decimation_passes_audio_tones_within_a_tenth_of_a_db(freq_hz):
    y = decimate(sine(freq_hz, 0.5, SIM_RATE_HZ), FACTOR)
    assert abs(steady_level_db(y)) < 0.1        # design target: flat audio band


def test_decimation_has_zero_delay():
    x = sine(50.0, 0.2, SIM_RATE_HZ)
    y = decimate(x, FACTOR)
    assert y.size == math.ceil(x.size / FACTOR)
    ends = 50          # output samples within half the filter length of an end
    assert np.max(np.abs(y - x[::FACTOR])[ends:-ends]) < 1e-6
    assert np.max(np.abs(y - x[::FACTOR])) < 1e-3


def test_decimation_keeps_a_dc_level_up_to_the_ends():
    y = decimate(np.full(10000, 4.5), FACTOR)
    assert np.allclose(y, 4.5, atol=1e-9)


def test_decimation_by_one_is_a_copy_and_a_bad_factor_is_rejected():
    x = sine(100.0, 0.01, SIM_RATE_HZ)
    assert np.array_equal(decimate(x, 1), x)
    for bad in (0, 2.5, -4):
        with pytest.raises(ValueError):
            decimate(x, bad)


@pytest.mark.parametrize("factor", [2, 4, 16])
def test_antialias_taps_are_scipys_kaiser_window_design(factor):
    # source: scipy.signal.kaiserord and firwin, the same Kaiser window method (an
    # independent implementation); ours rounds the length up to odd
    from scipy.signal import firwin, kaiserord

    stop = 1.0 / factor
    numtaps, beta = kaiserord(STOPBAND_ATTENUATION_DB, stop - PASSBAND_FRACTION * stop)
    reference = firwin(numtaps | 1, 0.5 * (PASSBAND_FRACTION * stop + stop),
                       window=("kaiser", beta))
    taps = antialias_taps(factor)
    assert taps.size == reference.size
    assert np.max(np.abs(taps - reference)) < 1e-15


def test_a_kaiser_design_below_fifty_db_or_with_crossed_edges_is_refused():
    for attenuation, pass_edge, stop_edge in ((40.0, 0.2, 0.3), (80.0, 0.3, 0.2),
                                              (80.0, 0.0, 0.3)):
        with pytest.raises(ValueError):
            kaiser_lowpass_taps(attenuation, pass_edge, stop_edge)


@pytest.mark.parametrize("factor, n", [(4, 1001), (16, 5000), (16, 7), (3, 100)])
def test_decimation_is_the_filter_sum_at_every_kept_sample_with_held_ends(factor, n):
    # common practice: output k = sum_i h[i] x[k factor + half - i], with the record
    # held at its end values beyond its ends (written out here term by term)
    x = np.random.default_rng(n).standard_normal(n)
    h = antialias_taps(factor)
    half = (h.size - 1) // 2
    index = np.clip(np.arange(0, n, factor)[:, None] + half - np.arange(h.size)[None, :],
                    0, n - 1)
    direct = np.array([math.fsum(row) for row in h[None, :] * x[index]])
    assert np.max(np.abs(decimate(x, factor) - direct)) < 1e-13


@pytest.mark.parametrize("alias_hz", [AUDIO_RATE_HZ - 15000.0, AUDIO_RATE_HZ + 15000.0,
                                      4 * AUDIO_RATE_HZ + 15000.0])
def test_decimation_by_sixteen_keeps_the_audio_band_and_stops_what_would_alias(alias_hz):
    rate_hz = 16 * AUDIO_RATE_HZ
    passed = decimate(sine(15000.0, 0.2, rate_hz), 16)
    stopped = decimate(sine(alias_hz, 0.2, rate_hz), 16)   # lands on 15 kHz if not stopped
    assert abs(steady_level_db(passed)) < 0.1          # design target: flat audio band
    assert steady_level_db(stopped) < -STOPBAND_ATTENUATION_DB + 3.0   # design target


def test_drift_removal_near_the_ends_matches_a_direct_moving_average():
    # The definition written out: x minus its mean, minus the Hann-weighted average of
    # the samples within half a window that lie inside the record (common practice).
    x = 2.0 + np.random.default_rng(3).standard_normal(3000)
    rate_hz = 5000.0
    taps = int(round(0.4 * rate_hz)) | 1
    weights = np.hanning(taps + 2)[1:-1]
    centred = x - np.mean(x)
    half = taps // 2
    expected = np.empty_like(x)
    for i in (0, 1, 700, 1500, 2999):
        lo, hi = max(0, i - half), min(x.size, i + half + 1)
        w = weights[half - (i - lo):half + (hi - i)]
        expected[i] = centred[i] - np.sum(w * centred[lo:hi]) / np.sum(w)
        assert remove_dc(x, rate_hz)[i] == pytest.approx(expected[i], abs=1e-12)


def test_dc_and_slow_drift_are_removed_and_the_tone_kept():
    tone = sine(1000.0, 1.0, AUDIO_RATE_HZ)
    t = np.arange(tone.size) / AUDIO_RATE_HZ
    drift_volts = 0.8          # a coupling capacitor settling with a 0.25 s time constant
    x = 4.5 + drift_volts * np.exp(-t / 0.25) + tone
    y = remove_dc(x, AUDIO_RATE_HZ)
    middle = slice(AUDIO_RATE_HZ // 10, -AUDIO_RATE_HZ // 10)
    assert abs(np.mean(y)) < 0.01
    # design target: the drift left after the first 0.1 s is 30 dB below its size
    assert np.max(np.abs(y[middle] - tone[middle])) < drift_volts * 10 ** (-30 / 20)
    steady = remove_dc(4.5 + tone, AUDIO_RATE_HZ)
    beyond_half_window = slice(AUDIO_RATE_HZ // 5, -AUDIO_RATE_HZ // 5)
    assert np.max(np.abs(steady[beyond_half_window] - tone[beyond_half_window])) < 1e-6
    assert np.max(np.abs(steady - tone)) < 0.002      # near the ends: under 0.2 %


def test_fixed_full_scale_keeps_relative_loudness_of_variants():
    quiet, loud = (sine(1000.0, 0.5, AUDIO_RATE_HZ, amplitude=a) for a in (0.25, 0.5))
    _, quiet_info = to_wav_samples(quiet, full_scale_volts=1.0, rate_hz=AUDIO_RATE_HZ)
    _, loud_info = to_wav_samples(loud, full_scale_volts=1.0, rate_hz=AUDIO_RATE_HZ)
    assert quiet_info["gain"] == loud_info["gain"] == 1.0
    # common practice: doubling an amplitude adds 20*log10(2) = 6.02 dB
    assert loud_info["rms_dbfs"] - quiet_info["rms_dbfs"] == pytest.approx(6.0206, abs=0.01)
    assert loud_info["peak_dbfs"] == pytest.approx(20.0 * math.log10(0.5), abs=0.02)
    assert quiet_info["normalized"] is False


def test_normalising_puts_the_peak_at_minus_one_dbfs():
    x = 3.0 + sine(440.0, 0.5, AUDIO_RATE_HZ, amplitude=0.01)
    samples, info = to_wav_samples(x, full_scale_volts=5.0, normalize=True, rate_hz=AUDIO_RATE_HZ)
    assert info["normalized"] is True
    assert info["peak_dbfs"] == pytest.approx(-1.0, abs=1e-9)
    assert 20.0 * math.log10(np.max(np.abs(samples))) == pytest.approx(-1.0, abs=1e-9)
    assert info["clipped_samples"] == 0


def test_fades_start_and_end_at_zero_and_last_the_requested_time():
    x = np.where(sine(100.0, 0.5, AUDIO_RATE_HZ) > 0, 1.0, -1.0) * 0.5
    samples, _ = to_wav_samples(x, full_scale_volts=1.0, fade_seconds=0.01, rate_hz=AUDIO_RATE_HZ)
    fade = int(0.01 * AUDIO_RATE_HZ)
    assert samples[0] == 0.0 and samples[-1] == 0.0
    assert np.all(np.abs(samples[1:fade // 4]) < np.abs(samples[fade + 10]))
    assert abs(samples[fade + 10]) == pytest.approx(0.5, abs=0.01)


@pytest.mark.parametrize("value, clipped", [(1.0, 0), (-1.0, 0), (0.99999, 0), (1.0001, 1),
                                            (-1.0001, 1), (7.0, 1)])
def test_clipping_is_counted_only_beyond_full_scale(value, clipped):
    samples, count = clip_to_full_scale(np.array([0.0, value, 0.5]))
    assert count == clipped
    assert samples[1] == max(-1.0, min(1.0, value))


def test_a_render_too_hot_for_its_full_scale_is_clipped_and_counted():
    x = sine(1000.0, 0.3, AUDIO_RATE_HZ, amplitude=2.0)
    hot, hot_info = to_wav_samples(x, full_scale_volts=1.0, rate_hz=AUDIO_RATE_HZ)
    safe, _ = to_wav_samples(x, full_scale_volts=2.0, rate_hz=AUDIO_RATE_HZ)
    expected = np.count_nonzero(np.abs(2.0 * safe) > 1.0)
    assert hot_info["clipped_samples"] == expected > 0
    assert np.max(np.abs(hot)) == 1.0
    assert hot_info["peak_dbfs"] == pytest.approx(20.0 * math.log10(2.0), abs=0.02)


def test_a_loud_render_gets_a_first_play_caution_and_a_quiet_one_does_not():
    square = np.where(sine(110.0, 0.5, AUDIO_RATE_HZ) > 0, 1.0, -1.0)
    _, loud = to_wav_samples(square, full_scale_volts=1.2, rate_hz=AUDIO_RATE_HZ)
    _, quiet = to_wav_samples(0.05 * square, full_scale_volts=1.2, rate_hz=AUDIO_RATE_HZ)
    assert loud["rms_dbfs"] > LOUD_RMS_DBFS > quiet["rms_dbfs"]
    warning = first_play_warning(loud)
    assert "low volume" in warning and "headphones" in warning
    assert first_play_warning(quiet) is None


def test_silence_has_no_level_and_no_caution():
    samples, info = to_wav_samples(np.full(4800, 2.0), full_scale_volts=1.0, rate_hz=AUDIO_RATE_HZ)
    assert np.all(samples == 0.0)
    assert info["peak_dbfs"] is None and info["rms_dbfs"] is None
    assert first_play_warning(info) is None


def test_wav_round_trip_in_memory_is_16_bit_mono_at_the_given_rate():
    samples, _ = to_wav_samples(sine(440.0, 0.2, AUDIO_RATE_HZ), full_scale_volts=2.0,
                                rate_hz=AUDIO_RATE_HZ)
    buffer = io.BytesIO()
    write_wav(buffer, samples, AUDIO_RATE_HZ)
    buffer.seek(0)
    info = soundfile.info(buffer)
    assert (info.samplerate, info.channels, info.subtype, info.format) == \
        (AUDIO_RATE_HZ, 1, "PCM_16", "WAV")
    buffer.seek(0)
    back, rate = soundfile.read(buffer, dtype="float64")
    assert rate == AUDIO_RATE_HZ and back.size == samples.size
    # common practice: 16-bit PCM quantises to steps of 2**-15 of full scale
    assert np.max(np.abs(back - samples)) <= 2.0 ** -15


def test_full_scale_samples_survive_the_round_trip_without_wrapping():
    buffer = io.BytesIO()
    write_wav(buffer, np.array([1.0, -1.0, 0.0, 0.5]), AUDIO_RATE_HZ)
    buffer.seek(0)
    back, _ = soundfile.read(buffer, dtype="int16")
    assert back[0] > 32000 and back[1] < -32000 and back[2] == 0


def test_write_wav_to_a_path_leaves_only_the_wav(tmp_path):
    target = tmp_path / "drone.wav"
    write_wav(target, np.zeros(480), AUDIO_RATE_HZ)
    assert [p.name for p in tmp_path.iterdir()] == ["drone.wav"]
    assert soundfile.info(str(target)).frames == 480


@pytest.mark.parametrize("samples, rate_hz", [(np.array([0.0, 1.5]), 48000),
                                              (np.zeros((2, 2)), 48000),
                                              (np.zeros(4), 44100.5)])
def test_write_wav_refuses_unclipped_samples_and_odd_rates(tmp_path, samples, rate_hz):
    with pytest.raises(ValueError):
        write_wav(tmp_path / "x.wav", samples, rate_hz)
    assert list(tmp_path.iterdir()) == []


def test_write_json_turns_non_finite_numbers_into_null(tmp_path):
    target = tmp_path / "drone.json"
    write_json(target, {"freq_hz": math.nan, "peak": -math.inf, "levels": np.array([0.0, -6.0]),
                        "count": np.int64(3), "ok": True, "note": "C#4"})
    text = target.read_text(encoding="utf-8")
    assert json.loads(text) == {"freq_hz": None, "peak": None, "levels": [0.0, -6.0],
                                "count": 3, "ok": True, "note": "C#4"}
    assert "\n  \"peak\": null" in text          # indent 2
    assert [p.name for p in tmp_path.iterdir()] == ["drone.json"]


def test_a_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "report.txt"
    write_text(target, "old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as temp:
            assert temp.parent == tmp_path and temp.suffix == ".txt"
            temp.write_text("half")
            raise RuntimeError("writer failed")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["report.txt"]


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from a PNG's header."""
    # source: ISO/IEC 15948:2004 (PNG), 5.2 signature, 11.2.2 IHDR (the first chunk:
    # 4-byte length, "IHDR", then width and height as big-endian 32-bit integers)
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def rows_with_colour(path, colour: str) -> np.ndarray:
    """Rows of the PNG at ``path`` holding pixels of exactly ``colour`` (``#rrggbb``)."""
    with Image.open(path) as image:
        pixels = np.asarray(image.convert("RGB"))
    wanted = np.array([int(colour[i:i + 2], 16) for i in (1, 3, 5)])
    return np.flatnonzero(np.all(pixels == wanted, axis=-1).any(axis=1))


def test_plots_write_pngs_of_their_size_with_the_traces_in_their_panels(tmp_path):
    rate_hz = 96000
    x = sine(440.0, 0.05, rate_hz)
    t = np.arange(x.size) / rate_hz
    waveform_plot(tmp_path / "w.png", t, {"n2": 4.5 + x, "n3": np.sign(x) * 4.0}, "drone",
                  subtitle="RV1.position=0.3")
    spectrum_plot(tmp_path / "s.png", np.sign(x), rate_hz, 440.0, "drone: n3")
    spectrum_plot(tmp_path / "s2.png", np.sign(x), rate_hz, None, "drone: n3")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == ["s.png", "s2.png", "w.png"]  # no temporary file left
    width = round(plots.FIGURE_WIDTH_IN * plots.DPI)
    two_panels = round((plots.HEIGHT_BASE_IN + 2 * plots.HEIGHT_PER_TRACE_IN) * plots.DPI)
    for name in names:
        assert png_size((tmp_path / name).read_bytes()) == (width, two_panels)
    # one panel per trace, top to bottom in the order given, each in its own colour
    first = rows_with_colour(tmp_path / "w.png", plots.TRACE_COLOURS[0])
    second = rows_with_colour(tmp_path / "w.png", plots.TRACE_COLOURS[1])
    assert first.size and second.size and first.max() < second.min()
    # the harmonics are numbered only when the fundamental is known
    assert rows_with_colour(tmp_path / "s.png", plots.TRACE_COLOURS[0]).size
    assert rows_with_colour(tmp_path / "s.png", plots.TRACE_COLOURS[1]).size
    assert not rows_with_colour(tmp_path / "s2.png", plots.TRACE_COLOURS[1]).size


def test_fft_lengths_are_the_smallest_regular_numbers_at_or_above_n():
    # source: scipy.fft.next_fast_len(n, real=True), the general-purpose library's
    # search over the same lengths (prime factors 2, 3 and 5 only)
    import scipy.fft

    rng = np.random.default_rng(11)
    for n in [*range(1, 3000), *rng.integers(3000, 50_000_000, 300).tolist()]:
        assert fft_length(n) == scipy.fft.next_fast_len(n, real=True), n
