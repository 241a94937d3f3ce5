"""The halfrail command as a user runs it: files written, clean errors, defaults from the library."""

import json
import subprocess
import sys
from pathlib import Path

import pytest
import soundfile

from sim import cli
from sim.render import RenderOptions

ROOT = Path(__file__).resolve().parents[1]
OSCILLATOR = ROOT / "scenarios" / "tri-square.yaml"

#: Keys of a measure and of the report, as fixed by the design notes (DESIGN.md, "Outputs").
MEASURE_KEYS = {"freq_hz", "note", "cents", "vmin", "vmax", "vpp", "mean", "rms", "duty",
                "harmonics_db", "thd_pct"}
REPORT_KEYS = {"patch", "seconds", "sample_rate", "probes", "listen", "supply", "warnings"}


def run_cli(*args, cwd=ROOT):
    return subprocess.run([sys.executable, "-m", "sim.cli", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True)


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    out = tmp_path_factory.mktemp("renders")
    result = run_cli("render", OSCILLATOR, "--seconds", "0.3", "--settle", "0.05", "--out", out,
                     "--quiet")
    return out, result


def test_render_writes_the_wav_the_plots_and_the_report(rendered):
    out, result = rendered
    assert result.returncode == 0, result.stderr
    names = sorted(p.name for p in out.iterdir())
    assert names == ["tri-square.json", "tri-square.png", "tri-square.spectrum.png",
                     "tri-square.wav"]
    for name in names:
        assert f"wrote {out / name}" in result.stdout


def test_render_report_has_the_documented_keys(rendered):
    out, _ = rendered
    report = json.loads((out / "tri-square.json").read_text())
    assert REPORT_KEYS <= set(report)
    assert set(report["listen"]) == MEASURE_KEYS
    assert set(report["probes"]) == {"tri", "sq"}
    assert all(set(m) == MEASURE_KEYS for m in report["probes"].values())
    assert set(report["supply"]) == {"mean_ma", "peak_ma", "volts_min"}
    assert report["sample_rate"] == RenderOptions().rate_hz


def test_render_wav_has_the_asked_length_and_rate(rendered):
    out, _ = rendered
    data, rate = soundfile.read(out / "tri-square.wav")
    assert rate == 48000
    assert data.shape[0] == pytest.approx(0.3 * rate, abs=2)


def test_an_override_on_the_command_line_changes_the_pitch(tmp_path):
    # Halving the integrator capacitor doubles the frequency of an ideal relaxation
    # oscillator (f = R2 / (4 R1 R3 C1), derivation in tests/test_physics.py); the
    # finite-gain corrections are almost the same for both, so the ratio is close to 2.
    a = run_cli("render", OSCILLATOR, "--seconds", "0.2", "--settle", "0.05", "--out",
                tmp_path / "a", "--quiet")
    b = run_cli("render", OSCILLATOR, "--seconds", "0.2", "--settle", "0.05", "--out",
                tmp_path / "b", "--quiet", "--set", "C1.value=11n")
    assert a.returncode == 0 and b.returncode == 0, (a.stderr, b.stderr)
    fa = json.loads((tmp_path / "a" / "tri-square.json").read_text())["listen"]["freq_hz"]
    fb = json.loads((tmp_path / "b" / "tri-square.json").read_text())["listen"]["freq_hz"]
    assert fb / fa == pytest.approx(2.0, rel=0.02)


@pytest.mark.parametrize("text, expected", [
    ("format: 1\npatch: x\nsupply: {volts: 9}\nparts:\n"
     "  R1: {kind: resistor, between: [a, b], value: -4k7}\n", ":5: part R1:"),
    ("format: 1\npatch: x\nsupply: {volts: 9}\nparts:\n"
     "  R1: {kind: resistr, between: [a, b], value: 1k}\n", ":5: part R1:"),
    ("format: 1\npatch: x\n  bad: [\n", ":3:"),
])
def test_a_bad_patch_gives_a_one_line_error_with_its_line_and_status_2(tmp_path, text, expected):
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    result = run_cli("render", path, "--out", tmp_path / "out", "--quiet")
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert f"{path}{expected}" in result.stderr
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_a_missing_patch_file_is_named_in_the_error(tmp_path):
    result = run_cli("render", tmp_path / "nowhere.yaml", "--quiet")
    assert result.returncode == 2
    assert "nowhere.yaml" in result.stderr and "Traceback" not in result.stderr


def test_a_bad_option_value_is_a_usage_error_without_traceback(tmp_path):
    result = run_cli("render", OSCILLATOR, "--seconds", "-1", "--out", tmp_path, "--quiet")
    assert result.returncode == 2
    assert "--seconds" in result.stderr and "Traceback" not in result.stderr


def test_cli_defaults_are_the_library_defaults():
    args = cli._parser().parse_args(["render", "x.yaml"])
    d = RenderOptions()
    assert (args.seconds, args.settle, args.rate, args.full_scale, args.normalize, args.solver,
            args.quality) == (d.seconds, d.settle, d.rate_hz, d.full_scale_volts, d.normalize,
                              d.solver, d.quality)


def test_kinds_lists_every_registered_kind():
    import blocks

    result = run_cli("kinds")
    assert result.returncode == 0
    for name in blocks.REGISTRY:
        assert f"{name}:" in result.stdout


def test_an_existing_render_is_replaced_whole_and_no_temporary_file_is_left(tmp_path):
    (tmp_path / "tri-square.wav").write_bytes(b"old")
    result = run_cli("render", OSCILLATOR, "--seconds", "0.1", "--settle", "0.05", "--out",
                     tmp_path, "--quiet")
    assert result.returncode == 0, result.stderr
    data, _ = soundfile.read(tmp_path / "tri-square.wav")
    assert data.size > 0
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "tri-square.json", "tri-square.png", "tri-square.spectrum.png", "tri-square.wav"]


def test_render_starts_without_the_libraries_only_other_commands_and_stages_need():
    # Measured start-up cost (python -X importtime): scipy.signal 0.9 s, scipy.optimize
    # 0.25 s, Pillow (the plots' drawing) 0.02 to 0.03 s. A render imports Pillow in a
    # thread while it simulates and needs no scipy.fft (numpy's FFT serves); parsing its
    # command line must import none of them.
    code = ("import sys; from sim import cli; cli._parser(cli._command_of(['render', 'x.yaml']))"
            ".parse_args(['render', 'x.yaml']); print(sorted(m for m in ('PIL', "
            "'scipy.signal', 'scipy.optimize', 'scipy.fft') if m in sys.modules))")
    result = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                            text=True)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"


def test_every_command_is_listed_even_when_only_one_is_built():
    commands = cli._parser("render")._subparsers._group_actions[0].choices
    assert set(commands) == {"render", "kinds", *cli.COMMAND_HELP}
    assert cli._command_of(["--help"]) is None and cli._command_of(["sweep", "x"]) == "sweep"


@pytest.mark.parametrize(("command", "collecting"), [(["kinds"], True),
                                                    (["check", "scenarios/tri-square.yaml"], False)])
def test_the_program_collects_garbage_only_for_commands_that_render_many_times(command,
                                                                               collecting):
    # common practice (Python's gc module): a short command whose imports make no
    # garbage runs with the collector off; the others get it back once imported
    code = ("import gc, sys\n"
            f"sys.argv = ['halfrail', *{command!r}]\n"
            "from sim.program import main\n"
            "status = main()\n"
            "print(gc.isenabled(), gc.get_freeze_count() > 1000)\n"
            "sys.exit(status)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=ROOT, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines()[-1] == f"{collecting} True"
