"""halfrail play: plays low, and says clearly what to do where it cannot play.

This machine has neither the sounddevice library nor a sound card, so the library is
replaced by small fake modules that behave as sounddevice does in each case.
"""

import sys
import types
from pathlib import Path

import numpy as np
import pytest

from sim import cli
from sim import play as play_module
from sim.render import RenderOptions

ROOT = Path(__file__).resolve().parents[1]
AMP = ROOT / "scenarios" / "amp.yaml"

#: Samples go to the sound card as 32-bit floats, whose rounding (a relative 6e-8)
#: moves a level by at most 5e-7 dB.
PEAK_TOLERANCE_DB = 1e-6


class PortAudioError(Exception):
    """Stands in for sounddevice.PortAudioError."""


def fake_sounddevice(output=None, query_error=None):
    """A module shaped like sounddevice: ``query_devices``, ``play``, ``wait``, ``stop``.

    ``output`` is what ``query_devices(kind="output")`` returns; ``query_error`` is
    raised by it instead (as sounddevice does when there is no default output).
    Played calls are recorded in ``module.played`` as ``(samples, rate)``.
    """
    module = types.ModuleType("sounddevice")
    module.PortAudioError = PortAudioError
    module.played = []

    def query_devices(kind=None):
        assert kind == "output"
        if query_error is not None:
            raise query_error
        return output

    module.query_devices = query_devices
    module.play = lambda samples, rate: module.played.append((np.array(samples), rate))
    module.wait = lambda: None
    module.stop = lambda: None
    return module


@pytest.fixture
def no_simulation(monkeypatch):
    """Fail the test if a render starts: a machine without sound must fail at once."""
    def refuse(*args, **kwargs):
        pytest.fail("play rendered the patch before finding out it cannot play")

    monkeypatch.setattr(play_module, "render", refuse)


def run_play(capsys, *args):
    status = cli.main(["play", str(AMP), *args])
    out, err = capsys.readouterr()
    return status, out, err


def test_without_the_audio_library_play_says_so_and_suggests_render(
        monkeypatch, capsys, no_simulation):
    monkeypatch.setitem(sys.modules, "sounddevice", None)   # makes `import sounddevice` fail
    monkeypatch.chdir(ROOT)
    status, _, err = run_play(capsys, "--set", "V1.volts=0.1")
    assert status == 1
    assert "sounddevice is not installed" in err
    assert "pip install 'halfrail[audio]'" in err
    assert "halfrail render scenarios/amp.yaml --set V1.volts=0.1" in err
    assert "renders/amp.wav" in err
    assert err.count("\n") == 1 and "Traceback" not in err


@pytest.mark.parametrize("sounddevice", [
    fake_sounddevice(query_error=PortAudioError("Error querying device -1")),
    fake_sounddevice(output={"name": "HDMI", "max_output_channels": 0}),
], ids=["no-default-output", "device-without-outputs"])
def test_without_an_output_device_play_says_so_and_suggests_render(
        monkeypatch, capsys, no_simulation, sounddevice):
    monkeypatch.setitem(sys.modules, "sounddevice", sounddevice)
    status, _, err = run_play(capsys)
    assert status == 1
    assert "cannot play" in err and "output" in err
    assert "halfrail render" in err and "renders/amp.wav" in err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert sounddevice.played == []


@pytest.fixture
def sound_card(monkeypatch):
    device = fake_sounddevice(output={"name": "speakers", "max_output_channels": 2})
    monkeypatch.setitem(sys.modules, "sounddevice", device)
    return device


@pytest.mark.parametrize("volume_args, peak_dbfs", [
    ((), play_module.DEFAULT_VOLUME_DBFS),
    (("--volume", "-30"), -30.0),
])
def test_play_sends_the_patch_peaking_at_the_asked_level_and_says_it_starts_low(
        capsys, sound_card, volume_args, peak_dbfs):
    status, out, _ = run_play(capsys, "--seconds", "0.2", "--quiet", *volume_args)
    assert status == 0
    [(samples, rate)] = sound_card.played
    assert rate == RenderOptions().rate_hz
    assert samples.shape == (round(0.2 * rate),)
    # source: definition of dBFS: 20 log10 of the peak relative to a full-scale sample of 1.0
    peak = float(np.max(np.abs(samples)))
    assert 20.0 * np.log10(peak) == pytest.approx(peak_dbfs, abs=PEAK_TOLERANCE_DB)
    assert f"at {peak_dbfs:g} dBFS peak" in out and "low on purpose" in out
    assert "headphones" in out


@pytest.mark.parametrize("volume", ["0", "6", "nan", "inf"])
def test_a_volume_above_the_headroom_is_refused_before_anything_plays(capsys, sound_card, volume):
    status, _, err = run_play(capsys, "--volume", volume)
    assert status == 2
    assert "--volume" in err and "Traceback" not in err
    assert sound_card.played == []


def test_play_options_default_to_the_library_defaults():
    args = cli._parser().parse_args(["play", "x.yaml"])
    assert args.volume == play_module.DEFAULT_VOLUME_DBFS
    assert args.seconds == RenderOptions().seconds
    assert args.overrides == []


def test_the_default_volume_is_low():
    # common practice: a first play of unknown material starts well below full scale
    assert play_module.DEFAULT_VOLUME_DBFS <= -20.0
