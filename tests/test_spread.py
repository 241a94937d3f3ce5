"""halfrail spread: builds drawn from the tolerances, against the closed form of the oscillator."""

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from sim import cli
from sim.render import RenderOptions
from sim.spread import (
    BATCH_SECONDS,
    DEFAULT_RUNS,
    DEFAULT_SEED,
    DEFAULT_WINDOW_CENTS,
    GATE_MISMATCH_FRACTION,
    SENSITIVITY_STEP_PCT,
    NoPitchError,
    draw_values,
    spread,
    toleranced,
    varied_parameters,
    write_spread,
)

ROOT = Path(__file__).resolve().parents[1]
OSCILLATOR = ROOT / "scenarios" / "tri-square.yaml"

#: Short renders keep the suite quick: 0.2 s holds about 80 periods of the oscillator.
OPTS = RenderOptions(seconds=0.2, settle=0.05, progress=False)

#: Builds of the one-part spread: each is checked against the closed form on its own,
#: so a dozen is plenty.
RUNS = 12

#: Tolerance of C1 in the one-part spread, percent.
C1_TOLERANCE_PCT = 10.0

#: The oscillator with every tolerance at zero but C1's: only C1 varies.
C1_ONLY = """\
format: 1
patch: c1-only
supply: {volts: 9, source_ohms: 1.5}
parts:
  U1A: {kind: inverter, in: sum, out: tri, chip: U1, tolerance: $gate}
  C1:  {kind: capacitor, between: [tri, sum], value: 22n, tolerance: $c1%}
  R3:  {kind: resistor, between: [sq, sum], value: 100k, tolerance: 0%}
  R1:  {kind: resistor, between: [tri, trig], value: 47k, tolerance: 0%}
  U1B: {kind: inverter, in: trig, out: mid, chip: U1, tolerance: $gate}
  U1C: {kind: inverter, in: mid, out: sq, chip: U1, tolerance: $gate}
  R2:  {kind: resistor, between: [sq, trig], value: 150k, tolerance: 0%}
probes: [tri, sq]
listen: tri
"""
NO_GATE_SPREAD = "{kn: 0%, kp: 0%, vtn: 0%, vtp: 0%}"

#: Two packages of gates, for the correlation of gates on one die.
TWO_PACKAGES = """\
format: 1
patch: two-packages
supply: {volts: 9}
parts:
  U1A: {kind: inverter, in: a, out: b}
  U1B: {kind: inverter, in: b, out: c}
  U2A: {kind: inverter, in: c, out: d}
  R1: {kind: resistor, between: [d, a], value: 1M}
probes: [a]
"""

#: Draws per parameter in the tests of the distribution: enough that a
#: Kolmogorov-Smirnov test tells uniform from a normal law at any usual width.
DRAWS = 4000


def cents_of_ratio(ratio: float) -> float:
    # source: definition of the cent, 1200 per octave
    return 1200.0 * math.log2(ratio)


@pytest.fixture(scope="module")
def c1_only(patch_from_yaml):
    return patch_from_yaml(C1_ONLY, gate=NO_GATE_SPREAD, c1=C1_TOLERANCE_PCT)


@pytest.fixture(scope="module")
def serial(c1_only):
    return spread(c1_only, runs=RUNS, seed=7, opts=OPTS, workers=1, progress=False)


@pytest.fixture(scope="module")
def parallel(c1_only):
    return spread(c1_only, runs=RUNS, seed=7, opts=OPTS, workers=2, progress=False)


# ---------------------------------------------------------------------------------
# what is drawn


def test_only_parameters_with_a_tolerance_above_zero_are_drawn(c1_only):
    assert [v.key for v in varied_parameters(c1_only)] == ["C1.value"]


@pytest.mark.parametrize("gate, drawn, not_drawn", [
    ("{kind: inverter, in: a, out: b}", {"kn", "kp", "vtn", "vtp"}, {"gain", "threshold"}),
    ("{kind: inverter, in: a, out: b, gain: 20}", {"gain", "threshold"}, {"kn", "kp", "vtn", "vtp"}),
])
def test_a_gate_draws_the_parameters_of_its_own_form_only(patch_from_yaml, gate, drawn,
                                                          not_drawn):
    patch = patch_from_yaml(f"""\
        format: 1
        patch: one-gate
        supply: {{volts: 9}}
        parts:
          U1A: {gate}
          R1: {{kind: resistor, between: [b, a], value: 1M, tolerance: 0%}}
        probes: [a]
        """)
    keys = {v.key.partition(".")[2] for v in varied_parameters(patch)}
    # the patch carries every tolerance of the gate: the form decides what is drawn
    assert {v.key.partition(".")[2] for v in toleranced(patch)} >= drawn | not_drawn
    assert keys == drawn


def test_every_drawn_value_stays_within_its_tolerance(patch_from_yaml):
    patch = patch_from_yaml(TWO_PACKAGES)
    varied = varied_parameters(patch)
    values = draw_values(varied, DRAWS, seed=3)
    nominal = np.array([v.nominal for v in varied])
    limit = np.array([v.tolerance_pct for v in varied]) / 100.0
    assert np.all(np.abs(values / nominal - 1.0) <= limit * (1.0 + 1e-12))


def test_a_part_is_drawn_uniformly_within_its_tolerance(c1_only):
    # source: JCGM 100:2008 (GUM) 4.3.7: a rectangular distribution when only limits are known
    varied = varied_parameters(c1_only)
    deviation = draw_values(varied, DRAWS, seed=5)[:, 0] / varied[0].nominal - 1.0
    half_width = C1_TOLERANCE_PCT / 100.0
    uniform = stats.kstest(deviation, stats.uniform(-half_width, 2 * half_width).cdf)
    normal_3_sigma = stats.kstest(deviation, stats.norm(0.0, half_width / 3.0).cdf)
    assert uniform.pvalue > 1e-3 and normal_3_sigma.pvalue < 1e-6


def test_gates_of_one_package_share_most_of_their_draw_and_packages_are_independent(
        patch_from_yaml):
    varied = varied_parameters(patch_from_yaml(TWO_PACKAGES))
    values = draw_values(varied, DRAWS, seed=11)
    column = {v.key: values[:, j] for j, v in enumerate(varied)}
    shared, own = 1.0 - GATE_MISMATCH_FRACTION, GATE_MISMATCH_FRACTION
    # a sum of a shared and an own uniform draw: correlation shared^2 / (shared^2 + own^2)
    expected = shared ** 2 / (shared ** 2 + own ** 2)
    same_package = np.corrcoef(column["U1A.vtn"], column["U1B.vtn"])[0, 1]
    other_package = np.corrcoef(column["U1A.vtn"], column["U2A.vtn"])[0, 1]
    # 4000 draws: the sampling error of a correlation is about (1 - r^2) / sqrt(n)
    assert same_package == pytest.approx(expected, abs=0.01)
    assert abs(other_package) < 4.0 / math.sqrt(DRAWS)


def test_the_same_seed_draws_the_same_builds_and_another_seed_others(c1_only):
    varied = varied_parameters(c1_only)
    first, again = draw_values(varied, RUNS, seed=7), draw_values(varied, RUNS, seed=7)
    other = draw_values(varied, RUNS, seed=8)
    assert np.array_equal(first, again) and not np.any(first == other)


def test_more_runs_extend_the_builds_of_fewer(c1_only):
    varied = varied_parameters(c1_only)
    assert np.array_equal(draw_values(varied, RUNS, seed=7)[:5], draw_values(varied, 5, seed=7))


# ---------------------------------------------------------------------------------
# one part varied, against the closed form f = R2 / (4 R1 R3 C1)

#: Pitch of a build against the closed form's prediction, relative to the shift. The
#: integrating gate's finite gain multiplies the period by 1 + 1/gain whatever C1 is;
#: what does not scale with C1 is second order: the gate and stray capacitance at the
#: summing node (7 pF against 22 nF, 0.03 %) and the time the Schmitt trigger's flips
#: and the outputs' slewing take (some microseconds of each 1.2 ms half period, a few
#: tenths of a percent). 1 % bounds them with room.
CLOSED_FORM_RELATIVE = 0.01


def test_each_build_shifts_the_pitch_as_the_closed_form_predicts(serial):
    c1 = serial.values[:, 0] / serial.varied[0].nominal
    # source: ideal relaxation oscillator f = R2 / (4 R1 R3 C1): f goes as 1 / C1
    predicted = np.array([cents_of_ratio(1.0 / ratio) for ratio in c1])
    assert np.max(np.abs(predicted)) > 100.0  # a 10 % part moves the pitch by over a semitone
    assert serial.cents == pytest.approx(predicted, rel=CLOSED_FORM_RELATIVE, abs=0.05)


def test_the_sensitivity_to_c1_is_the_closed_forms_minus_17_cents_per_percent(serial):
    step = SENSITIVITY_STEP_PCT / 100.0
    # source: f = R2 / (4 R1 R3 C1): a +1 % C1 gives 1200 log2(1/1.01) = -17.2 cents
    closed = (cents_of_ratio(1.0 / (1.0 + step)) - cents_of_ratio(1.0 / (1.0 - step))) / 2.0
    assert closed == pytest.approx(-17.3, abs=0.05)
    assert serial.report["sensitivity"]["C1.value"] == pytest.approx(
        closed, rel=CLOSED_FORM_RELATIVE)


def test_the_percentiles_and_the_window_describe_the_builds(serial):
    cents = serial.cents
    rep = serial.report
    # source: definitions of the median and the percentiles (numpy's linear interpolation)
    assert rep["cents"]["median"] == pytest.approx(np.median(cents))
    assert rep["cents"]["p5"] == pytest.approx(np.percentile(cents, 5))
    window = rep["within"]["window_cents"]
    assert rep["within"]["fraction"] == pytest.approx(np.mean(np.abs(cents) <= window))


def test_parallel_and_serial_runs_agree_exactly(serial, parallel):
    assert serial.report["freq_hz"] == parallel.report["freq_hz"]
    assert serial.report["sensitivity"] == parallel.report["sensitivity"]


def test_the_report_and_the_histogram_are_written(serial, tmp_path):
    json_path, png_path = write_spread(serial, tmp_path)
    report = json.loads(json_path.read_text())
    assert {"runs", "seed", "probe", "freq_hz", "cents", "within", "sensitivity"} <= set(report)
    assert set(report["cents"]) == {"median", "p5", "p95"}
    assert set(report["within"]) == {"window_cents", "fraction"}
    assert (report["runs"], report["seed"], report["probe"]) == (RUNS, 7, "tri")
    assert len(report["freq_hz"]) == RUNS
    assert png_path.name == "c1-only.spread.png" and png_path.read_bytes()[:4] == b"\x89PNG"


def test_a_patch_without_a_steady_pitch_fails_before_the_batch(patch_from_yaml):
    patch = patch_from_yaml("""\
        format: 1
        patch: biased
        supply: {volts: 9}
        parts:
          U1A: {kind: inverter, in: a, out: b}
          R1: {kind: resistor, between: [b, a], value: 1M}
        probes: [a]
        """)
    with pytest.raises(NoPitchError, match="no steady pitch"):
        spread(patch, runs=50, opts=OPTS, workers=1, progress=False)


# ---------------------------------------------------------------------------------
# the command


def test_the_command_line_defaults_are_the_librarys():
    args = cli._parser().parse_args(["spread", "x.yaml"])
    assert (args.runs, args.seed, args.window) == (DEFAULT_RUNS, DEFAULT_SEED,
                                                    DEFAULT_WINDOW_CENTS)
    assert (args.seconds, args.settle) == (BATCH_SECONDS, RenderOptions().settle)


@pytest.mark.parametrize("options, says", [
    (["--runs", "0"], "--runs"),
    (["--seed", "-1"], "--seed"),
    (["--window", "0"], "--window"),
    (["--probe", "nowhere"], "--probe nowhere"),
])
def test_bad_options_give_one_line_and_status_2(capsys, options, says):
    status = cli.main(["spread", str(OSCILLATOR), *options])
    err = capsys.readouterr().err.strip()
    assert status == 2 and says in err and len(err.splitlines()) == 1
