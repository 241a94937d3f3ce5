"""A/B comparison of two variants of a patch: pitch shift, level change, timbre change.

:func:`diff` is the library entry point behind ``halfrail diff``.  It renders two
patches with the same :class:`~sim.render.RenderOptions` (so both start at power-on,
keep the same stretch after ``settle`` and share one time grid), compares the
listening signal and every probe present in both, and writes three files into the
output folder:

- ``<stem>.diff.json``: ``{"a": REPORT, "b": REPORT, "listen": CHANGE, "probes": {NET:
  CHANGE}, ...}`` where REPORT is a full render report (see :func:`sim.render.render`)
  and CHANGE is ``{"cents", "db", "harmonics_db"}`` (:func:`compare_measures`);
- ``<stem>.diff.png``: per compared probe, A and B overlaid over the same times;
- ``<stem>.diff.wav``: A, then ``GAP_SECONDS`` of silence, then B, both scaled by the
  same fixed full-scale voltage (never normalised one by one), so a level change is
  heard as it is.

``<stem>`` is the patch name, or ``<A name>-vs-<B name>`` when two files with
different names are compared.  :func:`load_pair` builds the two variants from one or
two files and their overrides.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sim import audio, plots
from sim.canvas import Pen
from sim.errors import PatchError
from sim.fileio import write_json
from sim.patch import Patch, load_patch, parse_override
from sim.render import (PLOT_MIN_SECONDS, PLOT_NO_PITCH_SECONDS, PLOT_PERIODS,
                        Rendered, RenderOptions, listen_label, render)

#: Cents per octave: a cent is 1/1200 of an octave (definition of the cent), so a
#: frequency ratio r is 1200 * log2(r) cents.
CENTS_PER_OCTAVE = 1200.0

#: Silence between A and B in the A-then-B WAV, in seconds: long enough for the ear
#: to hear two separate sounds (and for a room's echo of A to die away), short
#: enough that A is still fresh in memory when B starts.
GAP_SECONDS = 0.5

#: Line styles of A and B in the overlay plot: A solid, B dashed, so the two read
#: apart where they overlap and in greyscale print; 1.5 pixels wide, a little wider than
#: a single trace, so the dashes of B read as dashes.
A_STYLE = Pen(plots.TRACE_COLOURS[0], 1.5)
B_STYLE = Pen(plots.TRACE_COLOURS[1], 1.5, "dashed")

#: Sides of a comparison, in the order the WAV plays them.
SIDES = ("a", "b")


@dataclass
class Diffed:
    """What a diff produced: the report (as written to JSON), the files, both renders."""

    report: dict
    a: Rendered
    b: Rendered
    paths: list[Path] = field(default_factory=list)

    @property
    def summary(self) -> str:
        """One line such as ``pitch +2.24 cents, level -0.30 dB at tri``."""
        return change_text(self.report["listen"], self.report["listen_label"])


def cents_between(freq_a_hz: float | None, freq_b_hz: float | None) -> float | None:
    """Pitch of B relative to A in cents, ``1200 log2(fb / fa)``; None if either is None."""
    if not freq_a_hz or not freq_b_hz:
        return None
    return CENTS_PER_OCTAVE * math.log2(freq_b_hz / freq_a_hz)


def db_between(rms_a_volts: float, rms_b_volts: float) -> float | None:
    """Level of B relative to A in dB, ``20 log10(rms_b / rms_a)``; None if either is 0."""
    if not (rms_a_volts > 0.0 and rms_b_volts > 0.0):
        return None
    return 20.0 * math.log10(rms_b_volts / rms_a_volts)


def compare_measures(a: dict, b: dict) -> dict:
    """The change from measures ``a`` to measures ``b`` (:func:`sim.measure.measure_signal` dicts).

    Returns ``{"cents"``: pitch shift of B relative to A (None when either has no
    steady pitch), ``"db"``: level change of the AC RMS in dB (None when either is
    silent), ``"harmonics_db"``: per harmonic 1..10, B's level relative to its
    fundamental minus A's, in dB (the change of timbre; element 0 is 0.0; None for
    a harmonic either lacks; the whole list is None when either has no pitch)``}``.
    """
    harmonics = None
    if a["harmonics_db"] is not None and b["harmonics_db"] is not None:
        harmonics = [None if la is None or lb is None else lb - la
                     for la, lb in zip(a["harmonics_db"], b["harmonics_db"])]
    return {"cents": cents_between(a["freq_hz"], b["freq_hz"]),
            "db": db_between(a["rms"], b["rms"]),
            "harmonics_db": harmonics}


def _signed(value: float) -> str:
    """``+2.24`` / ``-0.30``, two decimals; a change that rounds to zero reads ``+0.00``."""
    return f"{value if round(value, 2) else 0.0:+.2f}"


def shift_text(change: dict) -> str:
    """``pitch +2.24 cents, level -0.30 dB`` (``no steady pitch`` / ``silent`` when None)."""
    pitch = ("no steady pitch" if change["cents"] is None
             else f"pitch {_signed(change['cents'])} cents")
    level = "silent" if change["db"] is None else f"level {_signed(change['db'])} dB"
    return f"{pitch}, {level}"


def change_text(change: dict, where: str) -> str:
    """``pitch +2.24 cents, level -0.30 dB at tri``: :func:`shift_text` at a net."""
    return f"{shift_text(change)} at {where}"


def describe_variant(patch: Patch) -> str:
    """``tri-square.yaml`` or ``tri-square.yaml with C1.value=18n``: how a variant was made."""
    name = os.path.basename(patch.path)
    return f"{name} with {', '.join(patch.overrides)}" if patch.overrides else name


def _apply(base: Patch, overrides: Sequence[str], side: str, display: str) -> Patch:
    """``base`` with ``"REF.param=value"`` overrides; errors name the side and the override.

    ``display`` is the file name as the user gave it (for messages).
    """
    if not overrides:
        return base
    requests: dict[str, str] = {}
    for text in overrides:
        try:
            ref, param, raw = parse_override(text)
        except ValueError as error:
            raise PatchError(f"{side.upper()} override {text}: {error}", file=display) from error
        requests[f"{ref}.{param}"] = raw
    try:
        return base.variant(requests)
    except PatchError as error:
        raise PatchError(f"{side.upper()} {error.detail}", file=error.file, line=error.line,
                         part=error.part) from error


def load_pair(path_a: str | os.PathLike, path_b: str | os.PathLike | None = None,
              overrides_a: Sequence[str] = (), overrides_b: Sequence[str] = ()
              ) -> tuple[Patch, Patch]:
    """Load the two variants to compare.

    With one file (``path_b`` None) both are variants of it: A with ``overrides_a``,
    B with ``overrides_b`` (``"REF.param=value"`` strings), each on top of the file
    as written.  With two files, A is ``path_a`` with ``overrides_a`` and B is
    ``path_b`` with ``overrides_b``.  Raises PatchError naming the file and the
    override (``B override C9.value=1n: no part C9 ...``).
    """
    base_a = load_patch(path_a)
    base_b = base_a if path_b is None else load_patch(path_b)
    display_b = os.fspath(path_a if path_b is None else path_b)
    return (_apply(base_a, overrides_a, "a", os.fspath(path_a)),
            _apply(base_b, overrides_b, "b", display_b))


def output_stem(patch_a: Patch, patch_b: Patch) -> str:
    """File stem of a diff: the patch name, or ``A-vs-B`` when the names differ."""
    if patch_a.name == patch_b.name:
        return patch_a.name
    return f"{patch_a.name}-vs-{patch_b.name}"


def ab_samples(a: Rendered, b: Rendered, opts: RenderOptions) -> tuple[np.ndarray, list[dict]]:
    """Audio samples of A, ``GAP_SECONDS`` of silence, then B; shape ``(na + gap + nb,)``.

    Each side goes through the render's own steps (:func:`sim.audio.decimate` and
    :func:`sim.audio.to_wav_samples`: DC removal, fades, clipping counted) with the
    same ``opts.full_scale_volts`` and never normalised, so the two halves keep their
    relative loudness.  Returns the samples and the two ``info`` dicts (A, B).
    """
    parts, infos = [], []
    for rendered in (a, b):
        listen_audio = rendered.audio_volts
        samples, info = audio.to_wav_samples(listen_audio, full_scale_volts=opts.full_scale_volts,
                                             normalize=False, rate_hz=opts.rate_hz)
        parts.append(samples)
        infos.append(info)
    gap = np.zeros(int(round(GAP_SECONDS * opts.rate_hz)))
    return np.concatenate([parts[0], gap, parts[1]]), infos


def overlay_plot(path: str | os.PathLike, times_s, traces: dict, title: str,
                 subtitle: str | None = None) -> None:
    """One panel per net with A and B overlaid over a shared time axis in ms.

    ``times_s``: shape ``(n,)`` seconds (both sides share it); ``traces``: net ->
    ``(volts_a, volts_b, label_a, label_b)`` with volts of shape ``(n,)``.  Sized and
    styled like :func:`sim.plots.waveform_plot` (A solid, B dashed, a legend above
    each panel so it never hides a trace).
    """
    if not traces:
        raise ValueError("overlay_plot needs at least one net")
    plots.stacked_plot(path, times_s, {
        net: [(volts_a, label_a, A_STYLE), (volts_b, label_b, B_STYLE)]
        for net, (volts_a, volts_b, label_a, label_b) in traces.items()}, title, subtitle)


def _plot_seconds(report_a: dict, report_b: dict) -> float:
    """Shown span: ``PLOT_PERIODS`` periods of the lower of the two pitches."""
    freqs = [r["listen"]["freq_hz"] for r in (report_a, report_b) if r["listen"]["freq_hz"]]
    if not freqs:
        return PLOT_NO_PITCH_SECONDS
    return max(PLOT_MIN_SECONDS, PLOT_PERIODS / min(freqs))


def _freq_text(measures: dict) -> str:
    return f"{measures['freq_hz']:.2f} Hz" if measures["freq_hz"] else "no steady pitch"


def diff(patch_a: Patch, patch_b: Patch, out_dir: str | os.PathLike = "renders",
         opts: RenderOptions | None = None, write: bool = True) -> Diffed:
    """Render A and B with the same ``opts`` and compare them (see the module docstring).

    With ``write=False`` nothing is written (the report and both renders are still
    returned).  The report's ``"probes"`` holds the nets probed in both, in A's order.
    """
    opts = opts or RenderOptions()
    opts.check()
    a = render(patch_a, out_dir, opts, write=False)
    b = render(patch_b, out_dir, opts, write=False)
    report_a, report_b = a.report, b.report
    shared = [net for net in patch_a.probes if net in patch_b.probes]
    label_a, label_b = listen_label(patch_a), listen_label(patch_b)
    where = label_a if label_a == label_b else f"{label_a} / {label_b}"
    samples, infos = ab_samples(a, b, opts)
    report = {
        "a": report_a,
        "b": report_b,
        "listen": compare_measures(report_a["listen"], report_b["listen"]),
        "probes": {net: compare_measures(report_a["probes"][net], report_b["probes"][net])
                   for net in shared},
        "listen_label": where,
        "variants": {"a": describe_variant(patch_a), "b": describe_variant(patch_b)},
        "warnings": [f"{side.upper()}: {warning}" for side, rep in zip(SIDES, (report_a, report_b))
                     for warning in rep["warnings"]],
        "audio": {"full_scale_volts": opts.full_scale_volts, "gap_seconds": GAP_SECONDS,
                  "order": list(SIDES),
                  **{side: info for side, info in zip(SIDES, infos)}},
    }
    result = Diffed(report=report, a=a, b=b)
    if not write:
        return result

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stem = output_stem(patch_a, patch_b)
    base = out / f"{stem}.diff"
    wav = Path(f"{base}.wav")
    audio.write_wav(wav, samples, opts.rate_hz)

    png = Path(f"{base}.png")
    shown = a.times < a.times[0] + _plot_seconds(report_a, report_b)
    if shared:
        traces = {net: (a.signals[net][shown], b.signals[net][shown],
                        f"A {_freq_text(report_a['probes'][net])}",
                        f"B {_freq_text(report_b['probes'][net])}  "
                        f"({shift_text(report['probes'][net])})")
                  for net in shared}
    else:
        traces = {where: (a.listen[shown], b.listen[shown],
                          f"A {_freq_text(report_a['listen'])}",
                          f"B {_freq_text(report_b['listen'])}")}
    title = f"{stem}: B vs A, {result.summary}"
    subtitle = (f"A: {report['variants']['a']};  B: {report['variants']['b']};  "
                f"from {opts.settle * 1e3:g} ms after power-on")
    overlay_plot(png, a.times[shown] - opts.settle, traces, title, subtitle)

    js = Path(f"{base}.json")
    write_json(js, report)
    result.paths = [wav, png, js]
    return result
