"""Tune to a note: the value of one part that puts a probe's pitch on a target.

:func:`tune` solves for the main value of a part (a resistor's or a capacitor's
``value``) with the simulated pitch as the function: ``scipy.optimize.brentq`` on
``cents(pitch(value), target)`` over ln(value), inside a bracket found by stepping out
from the part's current value by geometrically growing steps. Then it snaps the exact
value to the neighbouring values of an IEC 60063 E-series (the one below and the one
above), renders each, and reports its error in cents; when the best single value misses
by more than ``max_cents``, it adds the best two-part combinations from the same series
(one in series and one in parallel; for two-terminal parts), rendered too.

Every value is rendered, never predicted: the finite gain of the gates makes the
pitch depart from the ideal formulas, and that is what a builder needs to know.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from scipy.optimize import brentq

import blocks
from sim import eseries
from sim.errors import HalfrailError, UsageError
from sim.fileio import write_json
from sim.notes import UnknownNoteError, cents_between, freq_of, note_of
from sim.render import RenderOptions
from sim.runner import LOCAL, Job, run_jobs
from sim.spread import (
    BATCH_SECONDS,
    NoPitchError,
    base_overrides,
    check_probe,
    override,
    probe_freq,
    probe_label,
)
from sim.units import format_quantity

#: E-series used when none is asked for: E12 (10 % steps) is what most parts drawers hold.
DEFAULT_SERIES = "E12"

#: Error (cents) above which the best single value is not enough and two-part
#: combinations are tried. from memory: about the smallest mistuning a listener notices
#: between two successive tones.
DEFAULT_MAX_CENTS = 5.0

#: Units whose values come in E-series (IEC 60063 covers resistors and capacitors;
#: inductors are sold in the same series, common practice), and how two parts of each
#: combine: "sum" when wired in series adds them (resistance, inductance), "parallel"
#: when wired in parallel does (capacitance).
ADDS_IN = {"ohm": "series", "H": "series", "F": "parallel"}

#: First step from the current value when looking for the bracket: 5 % moves the
#: pitch of an oscillator by tens of cents (far above the measurement's resolution)
#: and stays within the local law of the part.
FIRST_STEP_RATIO = 1.05

#: The bracket's first try goes this much further (as a factor on the log step) than
#: the local slope predicts, so that it usually brackets the target at once.
BRACKET_OVERSHOOT = 1.25

#: Growth of the step (in ln(value)) each time a try does not bracket the target.
STEP_GROWTH = 2.0

#: The search stays within this factor either side of the current value (three
#: decades: beyond that the circuit is another circuit).
MAX_RANGE_RATIO = 1000.0

#: brentq's tolerance on ln(value): 1e-5 is 0.001 % of the value, far below the 1 %
#: steps of E96, and moves a pitch that goes as 1/value by 0.02 cent.
LOG_XTOL = 1e-5

#: Significant digits of a value found by the search when printed.
EXACT_DIGITS = 5

#: The search also stops when a render lands this close to the target (cents): far
#: below what an ear or a tuner tells apart, near the measurement's own resolution.
CONVERGED_CENTS = 0.01

#: Most evaluations of the root finder (each one a render).
MAX_ITERATIONS = 40

#: Relative margin within which a value counts as equal to a series value.
SAME_VALUE_RELATIVE = 1e-9


class TuneError(HalfrailError):
    """No value of the part puts the pitch on the target within the search range."""


@dataclass
class Tuned:
    """What :func:`tune` found: the report (``<patch>.tune.json``), the wall time of its
    renders (seconds) and the files written."""

    report: dict
    wall_seconds: float = 0.0
    paths: list[Path] = field(default_factory=list)


# ---------------------------------------------------------------------------------
# the target and the part


def target_hz(note: str | None = None, hz: float | None = None) -> float:
    """The target frequency (Hz) from a note name (``"A3"``) or a frequency; exactly one.

    Raises UsageError (exit status 2) for a bad note, a non-positive frequency, or
    neither / both given.
    """
    if (note is None) == (hz is None):
        raise UsageError("give the target as --note NAME (such as A3) or --hz F, one of them")
    if note is not None:
        try:
            return freq_of(note)
        except UnknownNoteError as error:
            raise UsageError(f"--note: {error}") from error
    if not (isinstance(hz, (int, float)) and math.isfinite(hz) and hz > 0):
        raise UsageError(f"--hz must be a positive frequency in Hz, got {hz!r}")
    return float(hz)


def tunable_part(patch, ref: str):
    """``(part, param)`` of ``ref``'s main value; UsageError when it has none to tune.

    A part can be tuned when its kind has a main value in a unit that comes in
    E-series (ADDS_IN): a resistor, a capacitor, a pot's track.
    """
    parts = {patch.supply.ref: patch.supply, **patch.parts}
    tunable = [r for r, p in parts.items() if _main_param(p) is not None]
    if ref not in parts:
        raise UsageError(f"no part {ref} in {patch.name} (parts that can be tuned: "
                         f"{', '.join(tunable) or 'none'})")
    part = parts[ref]
    param = _main_param(part)
    if param is None:
        kind = blocks.REGISTRY[part.kind]
        what = (f"its main value {kind.main_param} is in {kind.param(kind.main_param).unit} "
                "and does not come in E-series" if kind.main_param else "it has no main value")
        raise UsageError(f"{ref} ({part.kind}) cannot be tuned: {what} (parts that "
                         f"can be tuned: {', '.join(tunable) or 'none'})")
    return part, param


def _two_terminal(part) -> bool:
    """True for a part with two terminals, which two parts can replace wired in series or
    in parallel (not a pot: its wiper makes three)."""
    return sum(count for _, count in blocks.REGISTRY[part.kind].terminals) == 2


def _main_param(part):
    kind = blocks.REGISTRY[part.kind]
    if kind.main_param is None:
        return None
    param = kind.param(kind.main_param)
    return param if param.unit in ADDS_IN else None


# ---------------------------------------------------------------------------------
# standard values


def neighbours(value: float, series: str = DEFAULT_SERIES) -> list[float]:
    """The values of ``series`` just below and just above ``value`` (one when it is one),
    nearest first on a log scale (source: IEC 60063 for the series)."""
    if series not in eseries.SERIES:
        raise UsageError(f"unknown series {series!r} (choices: {', '.join(eseries.SERIES)})")
    decade = 10.0 ** math.floor(math.log10(value))
    values = sorted(m * decade * scale for m in eseries.SERIES[series]
                    for scale in (0.1, 1.0, 10.0))
    for v in values:
        if abs(v / value - 1.0) < SAME_VALUE_RELATIVE:
            return [v]
    below = max(v for v in values if v < value)
    above = min(v for v in values if v > value)
    return sorted((below, above), key=lambda v: abs(math.log(v / value)))


def combine(a: float, b: float, wiring: str, unit: str) -> float:
    """Value of two parts ``a`` and ``b`` wired ``"series"`` or ``"parallel"``."""
    if wiring == ADDS_IN[unit]:
        return a + b
    return a * b / (a + b)


def best_pairs(value: float, unit: str, series: str = DEFAULT_SERIES) -> list[tuple]:
    """The best pair of ``series`` values in series and the best in parallel.

    Returns ``[(combined, a, b, wiring), ...]`` (SI units), the closest to ``value`` on
    a log scale for each wiring. ``a`` carries most of the value: the larger part of an
    adding pair, in [value/2, value), or the smaller of the other wiring, in
    (value, 2 value]; ``b`` is a neighbour (:func:`neighbours`) of what would make the
    pair exact.
    """
    decade = 10.0 ** math.floor(math.log10(value))
    values = sorted(m * decade * scale for m in eseries.SERIES[series]
                    for scale in (0.1, 1.0, 10.0, 100.0))
    adds = ADDS_IN[unit]
    other = "parallel" if adds == "series" else "series"
    out = []
    for wiring in (adds, other):
        best = None
        for a in values:
            if wiring == adds and value / 2.0 <= a < value:
                rest = value - a
            elif wiring == other and value < a <= 2.0 * value:
                rest = 1.0 / (1.0 / value - 1.0 / a)
            else:
                continue
            for b in neighbours(rest, series):
                total = combine(a, b, wiring, unit)
                error = abs(math.log(total / value))
                if best is None or error < best[0]:
                    best = (error, (total, a, b, wiring))
        if best is not None:
            out.append(best[1])
    return out


# ---------------------------------------------------------------------------------
# the search


class _Converged(Exception):
    """Raised inside the root finder when a render lands within CONVERGED_CENTS."""

    def __init__(self, log_value: float):
        self.log_value = log_value


class _Pitch:
    """The simulated pitch as a function of the part's value, each value rendered once."""

    def __init__(self, patch, key: str, probe, target: float, opts: RenderOptions,
                 announce: Callable[[str], None] | None, unit: str):
        self.patch, self.key, self.probe, self.target = patch, key, probe, target
        self.opts, self.announce, self.unit = opts, announce, unit
        self.base = base_overrides(patch)
        self.freqs: dict[float, float | None] = {}
        self.exact_values: dict[float, float] = {}  # ln(value) -> value as given

    def value_at(self, log_value: float) -> float:
        """The value whose log is ``log_value`` (exactly a value given before, if one was)."""
        return self.exact_values.get(log_value, math.exp(log_value))

    def log_of(self, value: float) -> float:
        """ln(value), remembered so that :meth:`value_at` gives ``value`` back exactly."""
        log_value = math.log(value)
        self.exact_values[log_value] = value
        return log_value

    def job(self, value: float) -> Job:
        return Job(self.patch.path, self.base + (override(self.key, value),), self.opts)

    def many(self, values: list[float], workers, executor, progress) -> list[float | None]:
        todo = [v for v in dict.fromkeys(values) if v not in self.freqs]
        reports = run_jobs([self.job(v) for v in todo], workers=workers, executor=executor,
                           progress=progress, label=f"{self.patch.name} tune")
        for value, report in zip(todo, reports):
            self.freqs[value] = probe_freq(report, self.probe)
        return [self.freqs[v] for v in values]

    def freq(self, value: float) -> float | None:
        if value not in self.freqs:
            report = run_jobs([self.job(value)], workers=1, progress=False)[0]
            self.freqs[value] = probe_freq(report, self.probe)
            if self.announce:
                self.announce(f"{self.key} = {format_quantity(value, self.unit, EXACT_DIGITS)}: "
                              + _freq_text(self.freqs[value], self.target))
        return self.freqs[value]

    def cents(self, log_value: float) -> float:
        """Cents from the target to the pitch at value e^log_value; NoPitchError without one."""
        value = self.value_at(log_value)
        freq = self.freq(value)
        if not freq:
            raise NoPitchError(f"{self.key} = {format_quantity(value, self.unit)}: no steady "
                               "pitch at the probe; the circuit stops oscillating or drifts "
                               "there, so the target cannot be reached this way")
        return cents_between(self.target, freq)


def _freq_text(freq: float | None, target: float) -> str:
    if not freq:
        return "no steady pitch"
    return f"{freq:.3f} Hz ({cents_between(target, freq):+.2f} cents)"


def find_bracket(pitch: _Pitch, log_start: float, low: float | None, high: float | None
                 ) -> tuple[float, float]:
    """ln(value) bounds ``(a, b)`` where the pitch is on either side of the target.

    Steps out from ``log_start``: a first step of FIRST_STEP_RATIO gives the local
    slope; the next try goes BRACKET_OVERSHOOT times as far as that slope predicts, and
    each further try STEP_GROWTH times further still, until the sign of the error
    changes, the range MAX_RANGE_RATIO or a bound of the parameter (``low``, ``high``,
    SI) is reached. Raises _Converged when a try lands on the target, TuneError when
    none brackets it.
    """
    g0 = pitch.cents(log_start)
    if abs(g0) <= CONVERGED_CENTS:
        raise _Converged(log_start)
    probe = log_start + math.log(FIRST_STEP_RATIO)
    g1 = pitch.cents(probe)
    if abs(g1) <= CONVERGED_CENTS:
        raise _Converged(probe)
    if (g0 > 0) != (g1 > 0):
        return (log_start, probe) if log_start < probe else (probe, log_start)
    slope = (g1 - g0) / (probe - log_start)
    if slope == 0.0:
        raise TuneError(f"{pitch.key}: the pitch does not change with this part, so it "
                        "cannot tune the circuit")
    step = -g0 / slope * BRACKET_OVERSHOOT
    limit = math.log(MAX_RANGE_RATIO)
    lo_bound = max(log_start - limit, math.log(low) if low and low > 0 else -math.inf)
    hi_bound = min(log_start + limit, math.log(high) if high else math.inf)
    while True:
        trial = min(max(log_start + step, lo_bound), hi_bound)
        g = pitch.cents(trial)
        if abs(g) <= CONVERGED_CENTS:
            raise _Converged(trial)
        if (g > 0) != (g0 > 0):
            return (log_start, trial) if log_start < trial else (trial, log_start)
        if trial in (lo_bound, hi_bound):
            unit = pitch.unit
            raise TuneError(f"no value of {pitch.key} between "
                            f"{format_quantity(math.exp(lo_bound), unit)} and "
                            f"{format_quantity(math.exp(hi_bound), unit)} reaches "
                            f"{pitch.target:.3f} Hz (at "
                            f"{format_quantity(pitch.value_at(trial), unit)}: "
                            f"{_freq_text(pitch.freqs[pitch.value_at(trial)], pitch.target)})")
        step *= STEP_GROWTH


def solve(pitch: _Pitch, start: float, low: float | None, high: float | None) -> float:
    """The value (SI) whose simulated pitch is on the target: brentq over ln(value)."""
    try:
        a, b = find_bracket(pitch, pitch.log_of(start), low, high)

        def cents(log_value: float) -> float:
            g = pitch.cents(log_value)
            if abs(g) <= CONVERGED_CENTS:
                raise _Converged(log_value)
            return g

        root = brentq(cents, a, b, xtol=LOG_XTOL, maxiter=MAX_ITERATIONS)
    except _Converged as done:
        root = done.log_value
    # brentq returns its last estimate, which may not have been rendered itself
    value = pitch.value_at(root)
    pitch.freq(value)
    return value


# ---------------------------------------------------------------------------------
# tune


def tune(patch, ref: str, target: float, probe: str | None = None,
         series: str = DEFAULT_SERIES, max_cents: float = DEFAULT_MAX_CENTS,
         opts: RenderOptions | None = None, workers: int | None = None,
         executor: str = LOCAL, progress: bool = True,
         announce: Callable[[str], None] | None = None) -> Tuned:
    """Find the value of ``ref``'s main parameter that puts the pitch on ``target`` Hz.

    probe: a measured net (None: the listening signal); series: the E-series to snap
    to; max_cents: the error above which two-part combinations are tried; opts: render
    options of every render (default: render's, with BATCH_SECONDS kept); workers, executor: for the candidates' renders (the
    search itself renders one value at a time, here); announce: called with a line per
    search render. The report: ``{"part", "param", "unit", "probe", "target_hz",
    "target_note", "exact_value", "exact_freq_hz", "exact_cents", "nominal_value",
    "nominal_freq_hz", "series", "max_cents", "renders", "candidates": [{"value",
    "label", "series", "wiring", "parts", "freq_hz", "cents"}]}``, candidates best
    first. Nothing is written (see :func:`write_tune`).
    """
    opts = opts or RenderOptions(seconds=BATCH_SECONDS)
    opts.check()
    if series not in eseries.SERIES:
        raise UsageError(f"unknown series {series!r} (choices: {', '.join(eseries.SERIES)})")
    if not (max_cents >= 0 and math.isfinite(max_cents)):
        raise UsageError(f"--max-cents must be zero or positive, got {max_cents!r}")
    if not (target > 0 and math.isfinite(target)):
        raise UsageError(f"the target must be a positive frequency in Hz, got {target!r}")
    part, param = tunable_part(patch, ref)
    probe = check_probe(patch, probe)
    key = f"{ref}.{param.name}"
    start = float(part.values[param.name])
    started = time.perf_counter()
    pitch = _Pitch(patch, key, probe, target, opts, announce, param.unit)
    if not pitch.freq(start):
        raise NoPitchError(f"{patch.name}: no steady pitch at {probe_label(patch, probe)} with "
                           f"{key} as it is, so there is nothing to tune (try --probe)")
    exact = solve(pitch, start, param.minimum, param.maximum)

    unit = param.unit
    singles = [(v, eseries.letter_code(v, unit), "single", [v])
               for v in neighbours(exact, series)]
    candidates = _rendered(pitch, singles, series, target, workers, executor, progress)
    best = min((abs(c["cents"]) for c in candidates if c["cents"] is not None),
               default=math.inf)
    if best > max_cents and _two_terminal(part):
        pairs = [(total, (f"{eseries.letter_code(a, unit)}, {eseries.letter_code(b, unit)} "
                          f"in {wiring}"), wiring, [a, b])
                 for total, a, b, wiring in best_pairs(exact, unit, series)]
        candidates += _rendered(pitch, pairs, series, target, workers, executor, progress)
    candidates.sort(key=lambda c: math.inf if c["cents"] is None else abs(c["cents"]))
    exact_freq = pitch.freqs[exact]
    report = {
        "patch": patch.name,
        "part": ref,
        "param": param.name,
        "unit": unit,
        "probe": probe_label(patch, probe),
        "target_hz": target,
        "target_note": note_of(target)[0],
        "exact_value": exact,
        "exact_freq_hz": exact_freq,
        "exact_cents": cents_between(target, exact_freq) if exact_freq else None,
        "nominal_value": start,
        "nominal_freq_hz": pitch.freqs[start],
        "series": series,
        "max_cents": max_cents,
        "renders": len(pitch.freqs),
        "candidates": candidates,
        "seconds": opts.seconds,
        "settle_seconds": opts.settle,
        "overrides": list(pitch.base),
    }
    return Tuned(report=report, wall_seconds=time.perf_counter() - started)


def _rendered(pitch: _Pitch, items: list[tuple], series: str, target: float, workers,
              executor, progress) -> list[dict]:
    """Candidate dicts for ``(value, label, wiring, parts)`` items, each one rendered."""
    freqs = pitch.many([value for value, *_ in items], workers, executor, progress)
    return [{"value": value, "label": label, "series": series, "wiring": wiring,
             "parts": parts, "freq_hz": freq,
             "cents": cents_between(target, freq) if freq else None}
            for (value, label, wiring, parts), freq in zip(items, freqs)]


def write_tune(tuned: Tuned, out_dir: str | os.PathLike = "renders") -> list[Path]:
    """Write ``<patch>.tune.json`` into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    tuned.paths = [write_json(out / f"{tuned.report['patch']}.tune.json", tuned.report)]
    return tuned.paths


def summary_lines(report: dict) -> list[str]:
    """What ``halfrail tune`` prints: the exact value, then each candidate."""
    unit = report["unit"]
    key = f"{report['part']}.{report['param']}"
    exact = (f"{key} = {format_quantity(report['exact_value'], unit, EXACT_DIGITS)} puts "
             f"{report['probe']} on {report['target_hz']:.3f} Hz ({report['target_note']}); "
             f"simulated {_freq_text(report['exact_freq_hz'], report['target_hz'])}")
    lines = [exact, f"{report['series']} values:"]
    for c in report["candidates"]:
        shown = (f"{c['freq_hz']:.3f} Hz, {c['cents']:+.2f} cents" if c["freq_hz"]
                 else "no steady pitch")
        lines.append(f"  {c['label']:<24s} {format_quantity(c['value'], unit, EXACT_DIGITS):>12s}: "
                     f"{shown}")
    return lines
