"""render --move: a parameter turned during one continuous render follows the stepped sweep."""

from pathlib import Path

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from sim import cli
from sim.errors import PatchError, UsageError
from sim.measure import pitch_track
from sim.patch import load_patch
from sim.render import Move, RenderOptions, move_pitch_track, parse_move, render
from sim.sweep import sweep

ROOT = Path(__file__).resolve().parents[1]

#: tri-square.yaml with its integrator resistor R3 (100k) replaced by a 20k pot wired as
#: a variable resistor in series with 90k: 90k to 110k from one end of the pot to the other.
POT_OSCILLATOR = """
format: 1
patch: pot-square
supply: {volts: 9, source_ohms: 1.5}
parts:
  U1A: {kind: inverter, in: sum, out: tri, chip: U1}
  C1:  {kind: capacitor, between: [tri, sum], value: 22n}
  RV1: {kind: pot, ends: [sq, arm], wiper: arm, value: 20k, position: 0.5}
  R3:  {kind: resistor, between: [arm, sum], value: 90k}
  R1:  {kind: resistor, between: [tri, trig], value: 47k}
  U1B: {kind: inverter, in: trig, out: mid, chip: U1}
  U1C: {kind: inverter, in: mid, out: sq, chip: U1}
  R2:  {kind: resistor, between: [sq, trig], value: 150k}
probes: [tri, sq]
listen: tri
"""

#: The move: 0.5 s from one end of the pot to the other, about 350 cents (the period
#: follows 90k + 20k * position), 700 cents per second.
MOVE_SECONDS = 0.5
MOVING = RenderOptions(seconds=MOVE_SECONDS, settle=0.05, progress=False,
                       moves=(Move("RV1", "position", "0", "1"),))

#: Pitch windows of 10 ms hold four periods (the fewest the pitch measure accepts is
#: three) and see 7 cents of movement, within its 5-cent limit between first and last
#: third of a window.
WINDOW_SECONDS = 0.01

#: Static steps of the reference curve, each 0.15 s after settling (60 periods).
STATIC = RenderOptions(seconds=0.15, settle=0.05, progress=False)


@pytest.fixture(scope="module")
def pot_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("moving") / "pot-square.yaml"
    path.write_text(POT_OSCILLATOR, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def static_curve(pot_path):
    """log2 of the pitch against the pot's position, from a stepped sweep of 5 points."""
    swept = sweep(pot_path, "RV1.position", "0:1:5", opts=STATIC, workers=1, progress=False,
                  write=False)
    points = swept.report["points"]
    return PchipInterpolator([p["value"] for p in points],
                             np.log2([p["freq_hz"] for p in points]))


@pytest.fixture(scope="module")
def moving(pot_path):
    return render(load_patch(pot_path), opts=MOVING, write=False)


def test_the_moving_pitch_follows_the_stepped_sweep(moving, static_curve):
    """At the centre of each window the pot sits at (t - settle) / seconds of its travel;
    the pitch measured there must be the static sweep's pitch at that position.

    The oscillator has no memory beyond one period, and over a window the position
    moves linearly, so the window's mean period is the period at its centre up to the
    curvature of 1/f in the position (0.01 cent here). The static curve is interpolated
    between 5 points a quarter of the travel apart (curvature error about 0.5 cent).
    Hence 2 cents, well under the 5 cents a listener can pick out (sim.measure).
    """
    times, freqs = pitch_track(moving.listen, moving.sample_rate_hz, WINDOW_SECONDS)
    tracked = np.isfinite(freqs)
    assert np.mean(tracked) > 0.75
    position = times[tracked] / MOVE_SECONDS
    # source: the same circuit's stepped sweep (a pot moved slowly is a pot at rest)
    cents = 1200.0 * (np.log2(freqs[tracked]) - static_curve(position))
    assert np.max(np.abs(cents)) < 2.0


def test_the_whole_moving_render_has_no_single_steady_pitch(moving):
    assert moving.report["listen"]["freq_hz"] is None


def test_the_report_names_the_move_and_keeps_a_pitch_track(moving, static_curve):
    report = moving.report
    assert report["moves"] == [{"param": "RV1.position", "start": 0.0, "stop": 1.0,
                                "from_seconds": 0.05, "to_seconds": 0.05 + MOVE_SECONDS}]
    track = report["pitch_track"]
    assert len(track["times_s"]) == len(track["freq_hz"])
    found = [(t, f) for t, f in zip(track["times_s"], track["freq_hz"]) if f is not None]
    # source: the stepped sweep (tolerance as above)
    for t, f in (found[0], found[-1]):
        assert 1200 * abs(np.log2(f) - static_curve(t / MOVE_SECONDS)) < 2.0
    assert found[0][1] > found[-1][1]


def test_the_moved_value_is_not_reported_as_an_override(moving):
    assert moving.report["overrides"] == []


def test_a_moving_supply_reports_the_battery_current_of_its_own_voltage(pot_path):
    """The battery current is worked out from the EMF at each instant, which moves with
    the supply: its mean lies between the currents of still renders at the two ends."""
    opts = RenderOptions(seconds=0.15, settle=0.05, progress=False)
    ends = [render(load_patch(pot_path, [f"supply.volts={v}"]), opts=opts,
                   write=False).report["supply"]["mean_ma"] for v in (9, 6)]
    moved = RenderOptions(seconds=0.15, settle=0.05, progress=False,
                          moves=(Move("supply", "volts", "9", "6"),))
    mean_ma = render(load_patch(pot_path), opts=moved, write=False).report["supply"]["mean_ma"]
    # common practice: a CMOS gate in its linear region draws less at a lower supply
    assert min(ends) < mean_ma < max(ends)


@pytest.mark.parametrize("low_hz, octaves, seconds", [(200.0, 1.0, 4.0), (100.0, 0.5, 4.0),
                                                     (800.0, 1.0, 1.0)])
def test_the_pitch_track_follows_a_gliding_triangle(low_hz, octaves, seconds):
    """A triangle whose pitch rises by equal ratios in time: each tracked point must
    sit on the glide, whichever window length the track picks for it. The glides
    (150 to 1200 cents per second) stay slow enough for a window of four periods to see
    under the pitch measure's 5-cent drift limit."""
    rate = 192000
    t = np.arange(int(seconds * rate)) / rate
    freq = low_hz * 2.0 ** (octaves * t / seconds)
    cycles = np.cumsum(freq) / rate
    volts = np.abs((cycles % 1.0) - 0.5)
    track = move_pitch_track(volts, rate)
    found = [(time, f) for time, f in zip(track["times_s"], track["freq_hz"]) if f is not None]
    assert len(found) > 0.9 * len(track["times_s"])
    times, freqs = np.array(found).T
    # source: definition of the glide, f(t) = f0 2^(octaves t / seconds); the window's
    # mean period sits within a hundredth of a cent of the period at its centre
    expected = low_hz * 2.0 ** (octaves * times / seconds)
    assert np.max(np.abs(1200 * np.log2(freqs / expected))) < 1.0


# -- reading and checking a move --------------------------------------------------------


@pytest.mark.parametrize("text, expected", [
    ("RV1.position=0:1", Move("RV1", "position", "0", "1")),
    ("R3.value = 47k : 4k7", Move("R3", "value", "47k", "4k7")),
    ("supply.volts=9:6.5", Move("supply", "volts", "9", "6.5")),
])
def test_a_move_reads_ref_param_start_and_stop(text, expected):
    assert parse_move(text) == expected


@pytest.mark.parametrize("text", ["RV1.position=0", "RV1.position=0:1:2", "RV1=0:1",
                                  "RV1.position", "RV1.position=:1"])
def test_a_malformed_move_is_a_usage_error(text):
    with pytest.raises(UsageError, match="expected REF.param=START:STOP"):
        parse_move(text)


@pytest.mark.parametrize("move, message", [
    ("RV1.taper=lin:log", "taper is a choice (lin, log, reverse-log); only a number can move"),
    ("C1.value=22n:33n", "sets a capacitance"),
    ("U1A.gain=10:20", "a gate's parameters stay fixed"),
    ("RV9.position=0:1", "no part RV9"),
    ("RV1.pos=0:1", "has no parameter 'pos'"),
    ("RV1.position=0:2", "out of range"),
    ("RV1.position=0:1", None),  # given twice below
])
def test_a_bad_move_exits_with_status_2_and_one_line(pot_path, tmp_path, capsys, move, message):
    extra = ["--move", move] if message is None else []
    status = cli.main(["render", str(pot_path), "--move", move, *extra, "--seconds", "0.1",
                       "--settle", "0.05", "--out", str(tmp_path), "--quiet"])
    err = capsys.readouterr().err
    assert status == 2
    assert (message or "names a parameter twice") in err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert not list(tmp_path.iterdir())


def test_a_bad_move_in_the_library_names_the_part(pot_path):
    opts = RenderOptions(seconds=0.1, settle=0.05, progress=False,
                         moves=(Move("RV1", "taper", "lin", "log"),))
    with pytest.raises(PatchError) as caught:
        render(load_patch(pot_path), opts=opts, write=False)
    assert caught.value.part == "RV1" and caught.value.file == str(pot_path)


def test_render_with_a_move_writes_its_files_and_prints_the_pitch_at_both_ends(
        pot_path, tmp_path, capsys):
    status = cli.main(["render", str(pot_path), "--move", "RV1.position=0:0.3", "--seconds", "0.2",
                       "--settle", "0.05", "--out", str(tmp_path), "--quiet"])
    out = capsys.readouterr().out
    assert status == 0
    assert "Hz at the start" in out and "Hz at the end" in out
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "pot-square.json", "pot-square.png", "pot-square.spectrum.png", "pot-square.wav"]
