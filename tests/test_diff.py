"""halfrail diff: two variants rendered alike, compared against closed forms and definitions."""

import json
import math
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile

from sim import cli
from sim.diff import (GAP_SECONDS, change_text, compare_measures, diff, load_pair,
                      output_stem)
from sim.render import RenderOptions, render

ROOT = Path(__file__).resolve().parents[1]
OSCILLATOR = ROOT / "scenarios" / "tri-square.yaml"
AMP = ROOT / "scenarios" / "amp.yaml"

#: Short renders keep the suite quick: 0.25 s holds about 100 periods of the
#: oscillator and 80 of the amplifier's tone, far more than a steady pitch needs.
OPTS = RenderOptions(seconds=0.25, settle=0.05, progress=False)

#: Keys of the render report (DESIGN.md, "Outputs"), which A and B each carry whole.
REPORT_KEYS = {"patch", "seconds", "sample_rate", "probes", "listen", "supply", "warnings"}

#: The integrator capacitor of tri-square.yaml, farads.
C1_FARADS = 22e-9

#: One 16-bit step at full scale: the two halves of the A-then-B WAV are compared with
#: their own renders to within one step.
PCM16_STEP = 1.0 / 32768.0


def run_cli(*args, cwd=ROOT):
    return subprocess.run([sys.executable, "-m", "sim.cli", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True)


def written_report(result):
    """The report as written to ``<patch>.diff.json`` (the last path a diff returns)."""
    return json.loads(result.paths[-1].read_text())


# -- the arithmetic of a comparison ------------------------------------------------


def measures(freq_hz=440.0, rms=1.0, harmonics_db=(0.0, -20.0, -30.0)):
    """A dict shaped like sim.measure.measure_signal's, with only what comparing reads."""
    return {"freq_hz": freq_hz, "rms": rms,
            "harmonics_db": None if harmonics_db is None else list(harmonics_db)}


@pytest.mark.parametrize("freq_b_hz, cents", [
    (880.0, 1200.0),                          # source: definition of the cent: 1200 per octave
    (440.0 * 2.0 ** (1.0 / 12.0), 100.0),     # source: equal temperament, 100 cents a semitone
    (220.0, -1200.0),                         # source: definition of the cent
])
def test_pitch_shift_is_1200_log2_of_the_frequency_ratio(freq_b_hz, cents):
    change = compare_measures(measures(freq_hz=440.0), measures(freq_hz=freq_b_hz))
    assert change["cents"] == pytest.approx(cents, abs=1e-9)


@pytest.mark.parametrize("rms_b, db", [
    (2.0, 6.020599913279624),                 # source: definition of the decibel, 20 log10(2)
    (0.1, -20.0),                             # source: definition of the decibel
    (1.0, 0.0),                               # source: definition of the decibel
])
def test_level_change_is_20_log10_of_the_rms_ratio(rms_b, db):
    assert compare_measures(measures(rms=1.0), measures(rms=rms_b))["db"] == pytest.approx(db)


@pytest.mark.parametrize("side", ["a", "b"])
def test_a_side_without_steady_pitch_gives_a_null_shift_not_a_guess(side):
    pitched, unpitched = measures(), measures(freq_hz=None, harmonics_db=None)
    a, b = (unpitched, pitched) if side == "a" else (pitched, unpitched)
    change = compare_measures(a, b)
    assert change["cents"] is None and change["harmonics_db"] is None
    assert change["db"] == 0.0
    assert change_text(change, "tri") == "no steady pitch, level +0.00 dB at tri"


def test_a_silent_side_gives_a_null_level_change():
    assert compare_measures(measures(rms=0.0), measures())["db"] is None


def test_the_harmonics_change_is_b_minus_a_per_harmonic_and_null_where_one_lacks_it():
    a = measures(harmonics_db=(0.0, -20.0, -30.0, None))
    b = measures(harmonics_db=(0.0, -14.0, -42.0, -50.0))
    assert compare_measures(a, b)["harmonics_db"] == [0.0, 6.0, -12.0, None]


@pytest.mark.parametrize("cents, db, text", [
    (2.2449, -0.3, "pitch +2.24 cents, level -0.30 dB at tri"),
    (-0.001, -0.004, "pitch +0.00 cents, level +0.00 dB at tri"),
])
def test_the_summary_reads_as_one_line_with_signs(cents, db, text):
    assert change_text({"cents": cents, "db": db, "harmonics_db": None}, "tri") == text


# -- a patch against itself ----------------------------------------------------------


@pytest.fixture(scope="module")
def against_itself(tmp_path_factory):
    a, b = load_pair(OSCILLATOR)
    return diff(a, b, tmp_path_factory.mktemp("itself"), OPTS)


@pytest.mark.parametrize("where", ["listen", "tri", "sq"])
def test_a_patch_diffed_against_itself_shifts_by_exactly_zero_cents_and_zero_db(
        against_itself, where):
    report = written_report(against_itself)
    change = report["listen"] if where == "listen" else report["probes"][where]
    assert change["cents"] == 0.0
    assert change["db"] == 0.0
    assert set(change["harmonics_db"]) == {0.0}


def test_the_diff_report_holds_both_render_reports_and_the_changes(against_itself):
    report = written_report(against_itself)
    assert {"a", "b", "listen", "probes"} <= set(report)
    assert REPORT_KEYS <= set(report["a"]) and REPORT_KEYS <= set(report["b"])
    assert {"cents", "db"} <= set(report["listen"])
    assert set(report["probes"]) == {"tri", "sq"}
    assert all({"cents", "db"} <= set(change) for change in report["probes"].values())


def test_diff_writes_json_png_and_wav_and_leaves_no_temporary_file(against_itself):
    folder = against_itself.paths[0].parent
    assert sorted(p.name for p in folder.iterdir()) == [
        "tri-square.diff.json", "tri-square.diff.png", "tri-square.diff.wav"]
    assert against_itself.paths[1].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# -- a changed capacitor: the closed form --------------------------------------------


@pytest.fixture(scope="module", params=["18n", "33n"])
def capacitor_changed(request, tmp_path_factory):
    a, b = load_pair(OSCILLATOR, overrides_b=[f"C1.value={request.param}"])
    farads = {"18n": 18e-9, "33n": 33e-9}[request.param]
    return farads, diff(a, b, tmp_path_factory.mktemp("c1"), OPTS, write=False)


@pytest.mark.parametrize("where", ["listen", "tri", "sq"])
def test_changing_the_integrator_capacitor_shifts_the_pitch_as_the_closed_form_predicts(
        capacitor_changed, where):
    """f = R2 / (4 R1 R3 C1) for the ideal oscillator, so B/A = C1_A / C1_B.

    The model's departures from the ideal (finite gain, output resistance, the
    Schmitt trigger's threshold) are static: with only C1 holding the slow dynamics,
    scaling C1 scales time and leaves the ratio exact.  What does not scale is the
    fast part of each flip (stray and gate capacitances, about 1 % of a period),
    so the ratio of two pitches keeps the closed form to within about 1 %.
    """
    farads, result = capacitor_changed
    change = result.report["listen"] if where == "listen" else result.report["probes"][where]
    # source: the Schmitt trigger flips when the triangle has moved VDD R1/R2 and the
    # integrator ramps at (VDD/2)/(R3 C1), so half a period is 2 R1 R3 C1 / R2 (common practice)
    predicted = 1200.0 * math.log2(C1_FARADS / farads)
    assert change["cents"] == pytest.approx(predicted, rel=0.01)


def test_two_files_compare_the_probes_they_share_and_name_both_in_the_outputs(
        tmp_path, capacitor_changed):
    farads, by_override = capacitor_changed
    text = OSCILLATOR.read_text()
    value = {18e-9: "18n", 33e-9: "33n"}[farads]
    text = (text.replace("patch: tri-square", "patch: tri-square-b")
                .replace("value: 22n", f"value: {value}")
                .replace("probes: [tri, sq]", "probes: [tri]"))
    other = tmp_path / "b.yaml"
    other.write_text(text)
    a, b = load_pair(OSCILLATOR, other)
    assert output_stem(a, b) == "tri-square-vs-tri-square-b"
    result = diff(a, b, tmp_path / "out", OPTS)
    assert set(result.report["probes"]) == {"tri"}
    assert result.report["listen"]["cents"] == pytest.approx(
        by_override.report["listen"]["cents"], abs=1e-6)
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [
        f"tri-square-vs-tri-square-b.diff.{suffix}" for suffix in ("json", "png", "wav")]


# -- a changed source amplitude: levels, timbre and the A-then-B WAV -----------------


@pytest.fixture(scope="module", params=["25m", "100m"])
def louder_source(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp("amp")
    a, b = load_pair(AMP, overrides_b=[f"V1.volts={request.param}"])
    ratio = {"25m": 0.5, "100m": 2.0}[request.param]
    return ratio, a, b, folder, diff(a, b, folder, OPTS)


def test_a_source_amplitude_change_shows_as_20_log10_of_the_ratio_at_the_source(louder_source):
    ratio, *_, result = louder_source
    # source: definition of the decibel (20 log10 of a voltage ratio)
    assert result.report["probes"]["tone"]["db"] == pytest.approx(20.0 * math.log10(ratio),
                                                                   abs=0.001)


def test_the_small_signal_amplifier_passes_the_same_level_change_to_its_output(louder_source):
    """The inverter biased mid-rail is linear for small signals: its THD here is a few
    thousandths of a percent, so the output's level changes by the input's within
    0.05 dB (the curvature of the gate's transfer moves the gain by far less)."""
    ratio, *_, result = louder_source
    # source: definition of the decibel; linearity of a small-signal amplifier (common practice)
    assert result.report["listen"]["db"] == pytest.approx(20.0 * math.log10(ratio), abs=0.05)


def test_weak_distortion_changes_the_harmonics_as_powers_of_the_amplitude(louder_source):
    """For weak distortion harmonic n grows as amplitude**n, so relative to the
    fundamental it moves by (n - 1) * 20 log10(ratio) dB: +6 dB for the second and
    +12 dB for the third when the input doubles."""
    ratio, *_, result = louder_source
    harmonics = result.report["listen"]["harmonics_db"]
    step_db = 20.0 * math.log10(ratio)
    # from memory: power-series model of a weakly nonlinear stage (textbook derivation)
    assert harmonics[1] == pytest.approx(step_db, abs=0.2)
    assert harmonics[2] == pytest.approx(2.0 * step_db, abs=0.2)


def test_the_a_then_b_wav_is_a_then_silence_then_b(louder_source):
    *_, result = louder_source
    data, rate = soundfile.read(result.paths[0])
    side = round(OPTS.seconds * rate)
    gap = round(GAP_SECONDS * rate)
    assert rate == OPTS.rate_hz
    assert data.shape == (2 * side + gap,)
    # the fades end A and start B at zero, so allow a sample either side of the gap
    assert not np.any(data[side + 1:side + gap - 1])


@pytest.mark.parametrize("side", ["a", "b"])
def test_each_half_of_the_a_then_b_wav_is_that_variant_rendered_alone(louder_source, side):
    """Same fixed full scale as ``render``, never normalised half by half."""
    _, a, b, folder, result = louder_source
    data, rate = soundfile.read(result.paths[0])
    alone = render(a if side == "a" else b, folder / f"alone-{side}", OPTS)
    expected, _ = soundfile.read(alone.paths[0])
    start = 0 if side == "a" else expected.size + round(GAP_SECONDS * rate)
    half = data[start:start + expected.size]
    assert half.size == expected.size
    assert np.max(np.abs(half - expected)) <= PCM16_STEP


def test_the_a_then_b_wav_keeps_the_level_change_between_its_halves(louder_source):
    ratio, *_, result = louder_source
    data, rate = soundfile.read(result.paths[0])
    side = round(OPTS.seconds * rate)
    rms_a = np.sqrt(np.mean(data[:side] ** 2))
    rms_b = np.sqrt(np.mean(data[-side:] ** 2))
    # source: definition of the decibel; 0.05 dB as for the output level above
    assert 20.0 * math.log10(rms_b / rms_a) == pytest.approx(20.0 * math.log10(ratio), abs=0.05)


# -- the command line -------------------------------------------------------------------


def test_the_diff_command_prints_the_paths_and_a_one_line_summary(tmp_path):
    result = run_cli("diff", AMP, "--b", "V1.volts=100m", "--seconds", "0.2", "--settle", "0.05",
                     "--out", tmp_path, "--quiet")
    assert result.returncode == 0, result.stderr
    for suffix in ("json", "png", "wav"):
        assert f"wrote {tmp_path / f'amp.diff.{suffix}'}" in result.stdout
    assert re.search(r"^B vs A: pitch [+-]\d+\.\d\d cents, level \+6\.0\d dB at out$",
                     result.stdout, re.MULTILINE)


@pytest.mark.parametrize("option, override", [
    ("--b", "C9.value=18n"),          # no such part
    ("--b", "C1.valu=18n"),           # no such parameter
    ("--a", "C1.value=-18n"),         # not a valid value
    ("--a", "C1value"),               # not REF.param=value
])
def test_a_bad_override_is_named_in_one_line_and_exits_2(capsys, tmp_path, option, override):
    status = cli.main(["diff", str(OSCILLATOR), option, override, "--out", str(tmp_path)])
    err = capsys.readouterr().err
    assert status == 2
    assert override in err and f"{option[-1].upper()} override" in err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert not any(tmp_path.iterdir())


def test_diff_options_default_to_the_library_defaults():
    args = cli._parser().parse_args(["diff", "x.yaml"])
    d = RenderOptions()
    assert (args.seconds, args.settle, args.rate, args.full_scale, args.quality) == (
        d.seconds, d.settle, d.rate_hz, d.full_scale_volts, d.quality)
    assert (args.patch_b, args.a_sets, args.b_sets) == (None, [], [])

