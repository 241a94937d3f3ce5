"""Live audition: render a patch in memory and play it through the default output.

:func:`play` is the library entry point behind ``halfrail play``.  Playback uses the
optional sounddevice library (``pip install 'halfrail[audio]'``).  It always starts
low: the played signal's peak is set to ``volume_dbfs`` (``DEFAULT_VOLUME_DBFS``
unless asked otherwise) whatever the circuit's own level, so an unknown patch never
blasts out.  Headphones need extra care even then.

Where the library or an output device is missing, :func:`open_output` raises
:class:`NoAudioError` (exit status 1) before anything is simulated, with a message
that suggests writing a WAV with ``halfrail render`` instead and names where it lands.
"""

from __future__ import annotations

import importlib
import inspect
import math
import os
from dataclasses import dataclass
from types import ModuleType

import numpy as np

from sim import audio
from sim.errors import HalfrailError, UsageError
from sim.patch import Patch
from sim.render import RenderOptions, render

#: Peak level of the played signal by default, in dBFS.  -20 dBFS peak is 19 dB
#: below the level a ``--normalize`` render plays at (-1 dBFS): a low start on any
#: volume setting that the listener raises on purpose (common practice for a first
#: play of unknown material; the figure itself is our choice, not a standard).
DEFAULT_VOLUME_DBFS = -20.0

#: Highest volume accepted, in dBFS: the same 1 dB of headroom a normalised render
#: keeps, so inter-sample peaks of the played audio do not clip.
MAX_VOLUME_DBFS = audio.NORMALIZE_PEAK_DBFS

#: The optional library that talks to the sound card, and how to install it.
AUDIO_LIBRARY = "sounddevice"
INSTALL_HINT = "pip install 'halfrail[audio]'"

#: Where ``halfrail render`` writes by default (read from render()'s signature so the
#: hint never drifts from the real default).
RENDER_OUT_DIR = inspect.signature(render).parameters["out_dir"].default


class NoAudioError(HalfrailError):
    """No way to play sound here (library or output device missing)."""

    exit_status = 1


@dataclass
class Played:
    """What was played: the report of the render, the samples and their level.

    ``warnings`` are the render's warnings that apply to playback (its caution about
    the WAV's loudness does not: playback is set to ``volume_dbfs``).
    """

    report: dict
    samples: np.ndarray
    rate_hz: int
    volume_dbfs: float
    warnings: list[str]


def render_hint(patch: Patch, out_dir: str | os.PathLike = RENDER_OUT_DIR) -> str:
    """``halfrail render PATCH [--set ...]`` and the WAV it writes, for messages."""
    path = patch.path
    try:
        relative = os.path.relpath(path)
        if not relative.startswith(os.pardir):
            path = relative
    except ValueError:          # another drive (Windows): keep the absolute path
        pass
    sets = "".join(f" --set {override}" for override in patch.overrides)
    wav = os.path.join(os.fspath(out_dir), f"{patch.name}.wav")
    return (f"write a WAV instead with `halfrail render {path}{sets}` and play {wav} "
            "with any audio player")


def open_output(patch: Patch) -> ModuleType:
    """Import sounddevice and check there is a default output device; return the module.

    Raises NoAudioError (with :func:`render_hint`) when the library is not installed,
    cannot load its PortAudio backend, or finds no output device.
    """
    hint = render_hint(patch)
    try:
        module = importlib.import_module(AUDIO_LIBRARY)
    except ImportError as error:
        raise NoAudioError(f"cannot play: the audio library {AUDIO_LIBRARY} is not installed "
                           f"({INSTALL_HINT}); {hint}") from error
    except OSError as error:     # sounddevice raises OSError when PortAudio is missing
        raise NoAudioError(f"cannot play: {AUDIO_LIBRARY} could not load its audio backend "
                           f"({error}); {hint}") from error
    try:
        device = module.query_devices(kind="output")
    except (module.PortAudioError, ValueError) as error:
        raise NoAudioError(f"cannot play: no audio output device found ({error}); "
                           f"{hint}") from error
    if not device or device.get("max_output_channels", 0) < 1:
        raise NoAudioError(f"cannot play: the default audio device has no output channels; "
                           f"{hint}")
    return module


def check_volume(volume_dbfs: float) -> None:
    """Raise UsageError unless ``volume_dbfs`` is finite and at most ``MAX_VOLUME_DBFS``."""
    if not (math.isfinite(volume_dbfs) and volume_dbfs <= MAX_VOLUME_DBFS):
        raise UsageError(f"--volume must be a level in dBFS at most {MAX_VOLUME_DBFS:g} "
                         f"(such as {DEFAULT_VOLUME_DBFS:g}), got {volume_dbfs!r}")


def audition_samples(listen_volts, opts: RenderOptions, volume_dbfs: float) -> np.ndarray:
    """Samples to play, shape ``(n,)`` at ``opts.rate_hz``, peaking at ``volume_dbfs``.

    ``listen_volts``: the render's listening signal at the audio rate
    (``Rendered.audio_volts``), shape ``(n,)``.  It goes through the render's own steps
    (DC removal, fades) normalised to ``audio.NORMALIZE_PEAK_DBFS``, then is scaled down
    to ``volume_dbfs``; silence stays silence.
    """
    samples, _ = audio.to_wav_samples(np.asarray(listen_volts), full_scale_volts=opts.full_scale_volts,
                                      normalize=True, rate_hz=opts.rate_hz)
    return samples * 10.0 ** ((volume_dbfs - audio.NORMALIZE_PEAK_DBFS) / 20.0)


def play(patch: Patch, opts: RenderOptions | None = None,
         volume_dbfs: float = DEFAULT_VOLUME_DBFS, announce=None) -> Played:
    """Render ``patch`` in memory and play its listening signal; return when it has played.

    The output is checked first (:func:`open_output`), so a machine without sound
    fails at once.  ``announce``, if given, is called with one line of text just
    before playback starts (the CLI prints it).  Ctrl-C stops playback and re-raises.
    """
    opts = opts or RenderOptions()
    opts.check()
    check_volume(volume_dbfs)
    device = open_output(patch)
    rendered = render(patch, opts=opts, write=False)
    samples = audition_samples(rendered.audio_volts, opts, volume_dbfs)
    if announce is not None:
        announce(f"playing {opts.seconds:g} s of {patch.name} at {volume_dbfs:g} dBFS peak "
                 "(low on purpose: raise it with --volume; headphones need extra care)")
    try:
        device.play(samples.astype(np.float32), opts.rate_hz)
        device.wait()
    except KeyboardInterrupt:
        device.stop()
        raise
    except device.PortAudioError as error:
        raise NoAudioError(f"cannot play: the audio device failed ({error}); "
                           f"{render_hint(patch)}") from error
    loud = audio.first_play_warning(rendered.report["audio"])
    return Played(report=rendered.report, samples=samples, rate_hz=opts.rate_hz,
                  volume_dbfs=volume_dbfs,
                  warnings=[w for w in rendered.report["warnings"] if w != loud])
