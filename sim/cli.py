"""The ``halfrail`` command: parses options, calls the library, prints what it wrote.

Defaults come from the library (:class:`sim.render.RenderOptions`), never restated here.
"""

from __future__ import annotations

import argparse
import gc
import os
import sys

from sim.errors import HalfrailError
from sim.render import QUALITIES, SOLVERS, RenderOptions

CAUTION = ("Caution: start playback at a low volume, especially on headphones. These circuits "
           "are meant for batteries or an isolated, certified low-voltage adapter.")


#: One-line help of the commands whose options are only added when that command runs
#: (their defaults live in modules that import Pillow or scipy.optimize).
COMMAND_HELP = {
    "diff": "compare two variants: pitch shift, level change, A-then-B WAV",
    "play": "render in memory and play through the sound card (starts low)",
    "sweep": "render a parameter at steps: pitch table, plot, WAV of steps",
    "spread": "render builds drawn from the parts' tolerances: pitch spread, histogram, "
              "sensitivities",
    "tune": "find the value of a part that puts the pitch on a note, snapped to E-series values",
    "check": "check the wiring rules before soldering (exit 1 on errors)",
    "sheet": "write the build sheet: packages, pins, wiring, parts list",
}


def _command_of(argv: list[str]) -> str | None:
    """The command ``argv`` names (its first word), or None (none yet, or ``--help``)."""
    return argv[0] if argv and not argv[0].startswith("-") else None


def _parser(command: str | None = None) -> argparse.ArgumentParser:
    """The command line parser. With ``command`` (``"render"``...), the options of the other
    commands that import more of the library are left out (they are listed, with their
    help), so a command starts without importing what only another one needs."""
    d = RenderOptions()
    top = argparse.ArgumentParser(
        prog="halfrail",
        description="Hear and measure an analog circuit of CMOS inverters before you solder it.")
    sub = top.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = sub.add_parser("render", help="simulate a patch and write a WAV, plots and a JSON report",
                       description="Simulate PATCH from power-on and write DIR/<patch>.wav, "
                                   ".png (waveforms), .spectrum.png and .json (measures).")
    r.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    r.add_argument("--seconds", type=float, default=d.seconds, metavar="S",
                   help=f"seconds of audio to keep (default {d.seconds:g})")
    r.add_argument("--settle", type=float, default=d.settle, metavar="S",
                   help=f"seconds simulated after power-on before keeping (default {d.settle:g}; "
                        "0 keeps the power-on transient)")
    _add_out_option(r)
    r.add_argument("--set", action="append", default=[], metavar="REF.param=value", dest="overrides",
                   help="override a part parameter, e.g. R3.value=47k or supply.volts=7.5 "
                        "(repeatable)")
    r.add_argument("--rate", type=int, default=d.rate_hz, metavar="HZ",
                   help=f"WAV sample rate (default {d.rate_hz})")
    r.add_argument("--full-scale", type=float, default=d.full_scale_volts, metavar="V",
                   help=f"volts at the listening point that make a full-scale sample "
                        f"(default {d.full_scale_volts:g}; fixed so variants compare)")
    r.add_argument("--normalize", action="store_true", help="scale the WAV's peak to -1 dBFS instead")
    r.add_argument("--solver", choices=SOLVERS, default=d.solver,
                   help="compiled (default) or reference (scipy Radau: slow, for cross-checks)")
    _add_quality_option(r, d)
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.add_argument("--verbose", action="store_true", help="print the solver's work counters")
    r.add_argument("--move", action="append", default=[], metavar="REF.param=START:STOP",
                   dest="moves",
                   help="turn a parameter linearly from START to STOP over the kept seconds, "
                        "in one continuous simulation, e.g. RV1.position=0:1 (repeatable)")

    k = sub.add_parser("kinds", help="list the kinds of parts and their parameters")
    k.add_argument("kind", nargs="?", help="one kind to describe in full")
    builders = {("check", "sheet"): lambda: _add_check_parsers(sub),
                ("diff",): lambda: _add_diff_parser(sub, d),
                ("play",): lambda: _add_play_parser(sub, d),
                ("sweep",): lambda: _add_sweep_parser(sub, d),
                ("spread",): lambda: _add_spread_parser(sub, d),
                ("tune",): lambda: _add_tune_parser(sub, d)}
    for names, build in builders.items():
        if command is None or command in names:
            build()
        else:
            for name in names:
                sub.add_parser(name, help=COMMAND_HELP[name])
    return top


def _render(args) -> int:
    from sim.patch import load_patch
    from sim.render import parse_move, render

    patch = load_patch(args.patch, args.overrides)
    opts = RenderOptions(seconds=args.seconds, settle=args.settle, rate_hz=args.rate,
                         full_scale_volts=args.full_scale, normalize=args.normalize,
                         solver=args.solver, quality=args.quality, progress=not args.quiet,
                         moves=tuple(parse_move(text) for text in args.moves))
    result = render(patch, args.out, opts)
    rep = result.report
    lis = rep["listen"]
    pitch = (f"{lis['freq_hz']:.3f} Hz ({lis['note']} {lis['cents']:+.2f} cents)"
             if lis["freq_hz"] else "no steady pitch")
    if "moves" in rep:
        found = [f for f in rep["pitch_track"]["freq_hz"] if f is not None]
        pitch = (f"pitch {found[0]:.2f} Hz at the start, {found[-1]:.2f} Hz at the end" if found
                 else "no steady pitch in any window")
    print(f"{patch.name}: {pitch}; supply {rep['supply']['mean_ma']:.2f} mA mean, "
          f"{rep['supply']['peak_ma']:.2f} mA peak")
    for warning in rep["warnings"]:
        print(f"warning: {warning}", file=sys.stderr)
    if args.verbose:
        print("solver: " + ", ".join(f"{key} {value:.4g}" if isinstance(value, float) else
                                     f"{key} {value}" for key, value in rep["solver"].items()))
    for path in result.paths:
        print(f"wrote {path}")
    print(CAUTION)
    return 0


def _kinds(args) -> int:
    import blocks
    from sim.units import format_quantity

    names = [args.kind] if args.kind else list(blocks.REGISTRY)
    for name in names:
        if name not in blocks.REGISTRY:
            raise HalfrailError(f"Unknown kind {name!r} (kinds: {', '.join(blocks.REGISTRY)})")
        kind = blocks.REGISTRY[name]
        terms = ", ".join(key if n == 1 else f"{key}: [{n} nets]" for key, n in kind.terminals)
        print(f"{name}: {kind.description}" + (f"  nets: {terms}" if terms else ""))
        if not args.kind:
            continue
        for p in kind.params:
            if p.choices:
                default = f"{p.default} (of {', '.join(p.choices)})"
            elif isinstance(p.default, (int, float)):
                default = format_quantity(float(p.default), p.unit)
            else:
                default = "required" if p.default is None else repr(p.default)
            print(f"  {p.name:16s} {default:28s} {p.doc}; {p.source}")
        if kind.models:
            print(f"  models: {', '.join(kind.models)}")
    return 0


def _add_out_option(p) -> None:
    """``--out DIR``: where every command writes its files."""
    p.add_argument("--out", default="renders", metavar="DIR", help="output folder (default renders/)")


def _add_quality_option(p, d: RenderOptions) -> None:
    """``--quality``: the compiled stepper's tolerance, for every command that renders."""
    p.add_argument("--quality", choices=list(QUALITIES), default=d.quality,
                   help="accuracy of the compiled stepper (default: default)")


def _add_diff_parser(sub, d: RenderOptions) -> None:
    c = sub.add_parser("diff", help=COMMAND_HELP["diff"],
                       description="Render two variants (two files, or one file with --a/--b "
                                   "overrides) with the same options and write "
                                   "DIR/<patch>.diff.json, .diff.png (A and B overlaid) and "
                                   ".diff.wav (A, a short silence, then B at the same scale).")
    c.add_argument("patch", metavar="PATCH", help="patch file (YAML): A, and B too if no PATCH_B")
    c.add_argument("patch_b", metavar="PATCH_B", nargs="?", help="a second patch file for B")
    c.add_argument("--a", action="append", default=[], metavar="REF.param=value", dest="a_sets",
                   help="override for A only (repeatable)")
    c.add_argument("--b", action="append", default=[], metavar="REF.param=value", dest="b_sets",
                   help="override for B only, e.g. --b C1.value=18n (repeatable)")
    c.add_argument("--seconds", type=float, default=d.seconds, metavar="S",
                   help=f"seconds of audio to keep of each (default {d.seconds:g})")
    c.add_argument("--settle", type=float, default=d.settle, metavar="S",
                   help=f"seconds simulated after power-on before keeping (default {d.settle:g})")
    _add_out_option(c)
    c.add_argument("--rate", type=int, default=d.rate_hz, metavar="HZ",
                   help=f"WAV sample rate (default {d.rate_hz})")
    c.add_argument("--full-scale", type=float, default=d.full_scale_volts, metavar="V",
                   help=f"volts that make a full-scale sample, the same for A and B "
                        f"(default {d.full_scale_volts:g})")
    _add_quality_option(c, d)
    c.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_play_parser(sub, d: RenderOptions) -> None:
    from sim.play import DEFAULT_VOLUME_DBFS

    p = sub.add_parser("play", help=COMMAND_HELP["play"],
                       description="Render PATCH in memory and play its listening signal through "
                                   "the default output (needs the optional sounddevice library). "
                                   "Playback peaks at --volume dBFS, low by default.")
    p.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    p.add_argument("--seconds", type=float, default=d.seconds, metavar="S",
                   help=f"seconds to play (default {d.seconds:g})")
    p.add_argument("--set", action="append", default=[], metavar="REF.param=value",
                   dest="overrides", help="override a part parameter, e.g. R3.value=47k (repeatable)")
    p.add_argument("--volume", type=float, default=DEFAULT_VOLUME_DBFS, metavar="DBFS",
                   help=f"peak level of playback in dBFS (default {DEFAULT_VOLUME_DBFS:g}: low on "
                        "purpose; raise it step by step, headphones need extra care)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _diff(args) -> int:
    from sim.diff import diff, load_pair

    patch_a, patch_b = load_pair(args.patch, args.patch_b, args.a_sets, args.b_sets)
    opts = RenderOptions(seconds=args.seconds, settle=args.settle, rate_hz=args.rate,
                         full_scale_volts=args.full_scale, quality=args.quality,
                         progress=not args.quiet)
    result = diff(patch_a, patch_b, args.out, opts)
    for warning in result.report["warnings"]:
        print(f"warning: {warning}", file=sys.stderr)
    for path in result.paths:
        print(f"wrote {path}")
    print(f"B vs A: {result.summary}")
    print(CAUTION)
    return 0


def _add_sweep_parser(sub, d: RenderOptions) -> None:
    from sim.sweep import STEP_SECONDS

    w = sub.add_parser("sweep", help=COMMAND_HELP["sweep"],
                       description="Render PATCH once per value of REF.param over RANGE and "
                                   "write DIR/<patch>.sweep.json, .sweep.csv (pitch, note, "
                                   "level, THD, supply current per step), .sweep.png (pitch "
                                   "against the value, with note names) and .sweep.wav (the "
                                   "steps in order at one level). Sweeping supply.volts adds "
                                   "the pitch drift in cents per volt.")
    w.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    w.add_argument("param", metavar="REF.param", help="parameter to step, e.g. RV1.position, "
                                                      "R3.value or supply.volts")
    w.add_argument("range", metavar="RANGE",
                   help="START:STOP:COUNT, e.g. 0:1:11, 47k:220k:8 or 9:5:9 (ends included)")
    w.add_argument("--log", action="store_true",
                   help="space the values by equal ratios instead of equal steps")
    w.add_argument("--battery-mah", type=float, metavar="MAH",
                   help="battery capacity: adds an estimate of battery life")
    _add_batch_options(w, d, STEP_SECONDS)
    w.add_argument("--rate", type=int, default=d.rate_hz, metavar="HZ",
                   help=f"WAV sample rate (default {d.rate_hz})")
    w.add_argument("--full-scale", type=float, default=d.full_scale_volts, metavar="V",
                   help=f"volts that make a full-scale sample, the same for every step "
                        f"(default {d.full_scale_volts:g})")
    w.add_argument("--normalize", action="store_true",
                   help="one gain for all steps, the loudest peaking at -1 dBFS")


def _sweep(args) -> int:
    from sim.sweep import summary_lines, sweep, table_lines

    opts = RenderOptions(seconds=args.seconds, settle=args.settle, rate_hz=args.rate,
                         full_scale_volts=args.full_scale, normalize=args.normalize,
                         quality=args.quality)
    result = sweep(args.patch, args.param, args.range, args.out, opts, overrides=args.overrides,
                   probe=args.probe, log=args.log, workers=args.workers,
                   executor=args.executor, battery_mah=args.battery_mah,
                   progress=not args.quiet)
    for line in table_lines(result.report):
        print(line)
    for line in summary_lines(result.report):
        print(line)
    for warning in result.report["warnings"]:
        print(f"warning: {warning}", file=sys.stderr)
    for path in result.paths:
        print(f"wrote {path}")
    print(f"{len(result.report['points'])} renders in {result.wall_seconds:.1f} s")
    print(CAUTION)
    return 0


def _add_batch_options(p, d: RenderOptions, seconds_default: float | None = None) -> None:
    """Options every command that renders a batch of variants shares (sweep, spread, tune).

    seconds_default: seconds kept of each render (default: spread's BATCH_SECONDS)."""
    from sim.runner import LOCAL
    from sim.spread import BATCH_SECONDS

    seconds = BATCH_SECONDS if seconds_default is None else seconds_default

    p.add_argument("--probe", metavar="NET",
                   help="probed net to measure (default: the listening signal)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local processes (default: one per core; 1 renders here)")
    p.add_argument("--executor", default=LOCAL, metavar="local|dask:ADDRESS",
                   help=f"where the renders run (default {LOCAL}; dask:ADDRESS sends them to "
                        "an existing Dask scheduler)")
    p.add_argument("--seconds", type=float, default=seconds, metavar="S",
                   help=f"seconds kept of each render (default {seconds:g})")
    p.add_argument("--settle", type=float, default=d.settle, metavar="S",
                   help=f"seconds simulated after power-on before keeping (default {d.settle:g})")
    _add_out_option(p)
    p.add_argument("--set", action="append", default=[], metavar="REF.param=value",
                   dest="overrides", help="override a part parameter first, e.g. R2.value=120k "
                                          "(repeatable)")
    _add_quality_option(p, d)
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_spread_parser(sub, d: RenderOptions) -> None:
    from sim.spread import DEFAULT_RUNS, DEFAULT_SEED, DEFAULT_WINDOW_CENTS

    s = sub.add_parser("spread", help=COMMAND_HELP["spread"],
                       description="Draw every toleranced parameter of PATCH uniformly within "
                                   "its tolerance, render each build, and write "
                                   "DIR/<patch>.spread.json (pitch of each build, percentiles "
                                   "in cents from nominal, the fraction within --window, the "
                                   "sensitivity to each parameter in cents per percent) and "
                                   ".spread.png (histogram).")
    s.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    s.add_argument("--runs", type=int, default=DEFAULT_RUNS, metavar="N",
                   help=f"builds to draw and render (default {DEFAULT_RUNS})")
    s.add_argument("--seed", type=int, default=DEFAULT_SEED, metavar="S",
                   help=f"seed of the draws: the same seed draws the same builds "
                        f"(default {DEFAULT_SEED})")
    s.add_argument("--window", type=float, default=DEFAULT_WINDOW_CENTS, metavar="CENTS",
                   help=f"a build is within when its pitch is this close to nominal "
                        f"(default {DEFAULT_WINDOW_CENTS:g} cents)")
    s.add_argument("--no-sensitivity", action="store_true",
                   help="skip the two renders per parameter that measure its sensitivity")
    _add_batch_options(s, d)


def _add_tune_parser(sub, d: RenderOptions) -> None:
    from sim.eseries import SERIES
    from sim.tune import DEFAULT_MAX_CENTS, DEFAULT_SERIES

    t = sub.add_parser("tune", help=COMMAND_HELP["tune"],
                       description="Solve for the value of REF (a resistor's or a capacitor's "
                                   "value) whose simulated pitch is the target, then render the "
                                   "neighbouring values of an E-series (and two-part "
                                   "combinations when one value misses by more than "
                                   "--max-cents); write DIR/<patch>.tune.json.")
    t.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    t.add_argument("ref", metavar="REF", help="part to change, e.g. R3 or C1")
    target = t.add_mutually_exclusive_group(required=True)
    target.add_argument("--note", metavar="NAME", help="target note, e.g. A3, C#4, Bb2 "
                                                       "(A4 = 440 Hz)")
    target.add_argument("--hz", type=float, metavar="F", help="target frequency in Hz")
    t.add_argument("--series", choices=list(SERIES), default=DEFAULT_SERIES,
                   help=f"E-series of the values to snap to (default {DEFAULT_SERIES})")
    t.add_argument("--max-cents", type=float, default=DEFAULT_MAX_CENTS, metavar="C",
                   help=f"try two-part combinations when the best single value is off by more "
                        f"(default {DEFAULT_MAX_CENTS:g} cents)")
    _add_batch_options(t, d)


def _batch_render_options(args) -> RenderOptions:
    return RenderOptions(seconds=args.seconds, settle=args.settle, quality=args.quality,
                         progress=False)


def _spread(args) -> int:
    from sim.patch import load_patch
    from sim.spread import ranked_sensitivity, spread, write_spread

    patch = load_patch(args.patch, args.overrides)
    result = spread(patch, runs=args.runs, seed=args.seed, probe=args.probe,
                    window_cents=args.window, opts=_batch_render_options(args),
                    workers=args.workers, executor=args.executor,
                    sensitivity=not args.no_sensitivity, progress=not args.quiet)
    rep = result.report
    print(f"{patch.name}: nominal {rep['nominal_hz']:.3f} Hz ({rep['nominal_note']} "
          f"{rep['nominal_cents']:+.2f} cents) at {rep['probe']}")
    c = rep["cents"]
    if c["median"] is None:
        print(f"{rep['runs']} builds: none has a steady pitch")
    else:
        print(f"{rep['runs']} builds (seed {rep['seed']}): median {c['median']:+.1f} cents, "
              f"5 % {c['p5']:+.1f}, 95 % {c['p95']:+.1f}; "
              f"{rep['within']['fraction']:.0%} within +-{rep['within']['window_cents']:g} cents"
              + (f"; {rep['no_pitch_runs']} without a steady pitch" if rep["no_pitch_runs"]
                 else ""))
    rows = ranked_sensitivity(result)
    if rows:
        print("sensitivity (cents per % change; RMS cents its tolerance adds):")
    for key, slope, rms in rows:
        print(f"  {key:16s} {slope:+8.2f} c/%  {rms:7.1f} cents  (+-{rep['tolerance_pct'][key]:g} %)")
    for path in write_spread(result, args.out):
        print(f"wrote {path}")
    print(f"{result.renders} renders in {result.wall_seconds:.1f} s")
    return 0


def _tune(args) -> int:
    from sim.patch import load_patch
    from sim.tune import summary_lines, target_hz, tune, write_tune

    patch = load_patch(args.patch, args.overrides)
    target = target_hz(note=args.note, hz=args.hz)
    tuned = tune(patch, args.ref, target, probe=args.probe, series=args.series,
                 max_cents=args.max_cents, opts=_batch_render_options(args),
                 workers=args.workers, executor=args.executor, progress=not args.quiet,
                 announce=None if args.quiet else print)
    for line in summary_lines(tuned.report):
        print(line)
    for path in write_tune(tuned, args.out):
        print(f"wrote {path}")
    print(f"{tuned.report['renders']} renders in {tuned.wall_seconds:.1f} s")
    return 0


def _play(args) -> int:
    from sim.patch import load_patch
    from sim.play import play

    patch = load_patch(args.patch, args.overrides)
    opts = RenderOptions(seconds=args.seconds, progress=not args.quiet)
    played = play(patch, opts, args.volume, announce=print)
    for warning in played.warnings:
        print(f"warning: {warning}", file=sys.stderr)
    return 0


def _add_check_parsers(sub) -> None:
    from sim.checks import CheckOptions

    d = CheckOptions()
    c = sub.add_parser("check", help=COMMAND_HELP["check"],
                       description="Check PATCH against the wiring rules (floating inputs, "
                                   "outputs tied together or overloaded, the supply rating, "
                                   "diodes without a limiting resistor...), print the findings "
                                   "and write DIR/<patch>.check.json. Exit status 1 when any "
                                   "error is found.")
    c.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    _add_out_option(c)
    c.add_argument("--set", action="append", default=[], metavar="REF.param=value",
                   dest="overrides", help="override a part parameter, e.g. R3.value=47k (repeatable)")
    c.add_argument("--simulate", action="store_true",
                   help="also simulate and check output and clamp currents and the supply sag")
    c.add_argument("--seconds", type=float, default=d.seconds, metavar="S",
                   help=f"with --simulate: seconds checked after settling (default {d.seconds:g})")
    c.add_argument("--settle", type=float, default=d.settle, metavar="S",
                   help=f"with --simulate: seconds after power-on left out (default {d.settle:g})")
    c.add_argument("--sag", type=float, default=d.sag_fraction, metavar="FRACTION",
                   help=f"with --simulate: supply sag that counts, as a fraction of the battery "
                        f"(default {d.sag_fraction:g})")
    s = sub.add_parser("sheet", help=COMMAND_HELP["sheet"],
                       description="Place PATCH's gates on hex inverter packages and write "
                                   "DIR/<patch>.sheet.md (pins, wiring net by net, parts), "
                                   "<patch>.bom.csv and <patch>.sheet.json.")
    s.add_argument("patch", metavar="PATCH", help="patch file (YAML)")
    _add_out_option(s)
    s.add_argument("--set", action="append", default=[], metavar="REF.param=value",
                   dest="overrides", help="override a part parameter, e.g. R3.value=47k (repeatable)")


def _check(args) -> int:
    from sim.checks import CAUTIONS, CheckOptions, check_patch, write_report
    from sim.patch import load_patch

    patch = load_patch(args.patch, args.overrides, lone_nets_ok=True)
    opts = CheckOptions(simulate=args.simulate, seconds=args.seconds, settle=args.settle,
                        sag_fraction=args.sag)
    report = check_patch(patch, opts)
    for finding in report.findings:
        print(finding.line())
    print(f"{patch.name}: {len(report.errors)} error(s), {len(report.warnings)} warning(s)"
          + ("" if report.simulated else " (static rules; --simulate adds the dynamic ones)"))
    print(f"wrote {write_report(report, args.out)}")
    print("Cautions:\n" + "\n".join(f"- {caution}" for caution in CAUTIONS))
    return report.exit_status


def _sheet(args) -> int:
    from sim.checks import CAUTIONS
    from sim.patch import load_patch
    from sim.sheet import build_sheet, write_sheet

    patch = load_patch(args.patch, args.overrides)
    sheet = build_sheet(patch)
    for name, package in sheet.packages.items():
        print(f"{name}: " + ", ".join(f"{g.ref} (in {g.in_pin}, out {g.out_pin})"
                                      for g in package.gates.values()))
    for note in sheet.notes:
        print(f"note: {note}")
    for path in write_sheet(sheet, args.out, CAUTIONS):
        print(f"wrote {path}")
    return 0


#: GIL switch interval of the ``halfrail`` process (s). A render's threads hand the GIL
#: to each other each time a compiled call returns (a chunk of the stepper, a chunk of
#: the WAV path): with Python's default of 5 ms, a thread back from a call that released
#: the GIL waits up to that long while another runs Python (an import, a plot). A tenth
#: of it bounds those waits (the stepper returns every 250 ms of simulated time, tens of
#: ms of wall time) for a few microseconds per switch.
SWITCH_INTERVAL_SECONDS = 0.0005

#: Commands run with the garbage collector off from start to end (as the program). The
#: program's imports (numpy, numba, numba's library, the kernel and the plots: some
#: 115 000 objects, hardly any garbage among them) make the collector walk its young
#: objects again and again: with it off they took 0.40 to 0.45 s instead of 0.47 to
#: 0.52 s (measured again after the plots left their library, which had made it 0.63 to
#: 0.70 s against 0.80 to 1.1 s). One render leaves little garbage in cycles; the
#: commands that render many times (sweep, spread, tune, diff) collect as usual once
#: their imports are done.
UNCOLLECTED_COMMANDS = ("render", "check", "sheet")


def main(argv: list[str] | None = None) -> int:
    """Run one command; ``argv`` defaults to the process's arguments.

    Called as the program (``argv`` None: ``sim.program.main``), it also tunes the
    process for one short command: the GIL switch interval (SWITCH_INTERVAL_SECONDS),
    the garbage collector off for the commands of UNCOLLECTED_COMMANDS, and told that
    what exists at the start (the imported modules) and at the end lives as long as the
    process: no collection walks the modules again, and exiting does not walk everything
    a render built (about 0.4 s after a render).
    """
    as_program = argv is None
    argv = sys.argv[1:] if argv is None else argv
    if as_program:
        sys.setswitchinterval(SWITCH_INTERVAL_SECONDS)
        gc.freeze()
        if _command_of(argv) in UNCOLLECTED_COMMANDS:
            gc.disable()
        else:
            gc.enable()
    try:
        return _run(argv)
    finally:
        if as_program:
            gc.freeze()


def _run(argv: list[str]) -> int:
    args = _parser(_command_of(argv)).parse_args(argv)
    try:
        if args.command == "render":
            return _render(args)
        if args.command == "check":
            return _check(args)
        if args.command == "sheet":
            return _sheet(args)
        if args.command == "diff":
            return _diff(args)
        if args.command == "play":
            return _play(args)
        if args.command == "sweep":
            return _sweep(args)
        if args.command == "spread":
            return _spread(args)
        if args.command == "tune":
            return _tune(args)
        return _kinds(args)
    except HalfrailError as error:
        print(f"halfrail: {error}", file=sys.stderr)
        return error.exit_status
    except KeyboardInterrupt:
        print("halfrail: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader went away (``halfrail ... | head``): stop quietly, as other tools do
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    sys.exit(main())
