"""The ``halfrail`` command: parses options, calls the library, prints what it wrote.

Defaults come from the library (:class:`sim.render.RenderOptions`), never restated here.
"""

from __future__ import annotations

import argparse
import sys

from sim.errors import HalfrailError
from sim.render import QUALITIES, SOLVERS, RenderOptions

CAUTION = ("Caution: start playback at a low volume, especially on headphones. These circuits "
           "are meant for batteries or an isolated, certified low-voltage adapter.")


def _parser() -> argparse.ArgumentParser:
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
    r.add_argument("--out", default="renders", metavar="DIR", help="output folder (default renders/)")
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
    r.add_argument("--quality", choices=list(QUALITIES), default=d.quality,
                   help="accuracy of the compiled stepper (default: default)")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.add_argument("--verbose", action="store_true", help="print the solver's work counters")

    k = sub.add_parser("kinds", help="list the kinds of parts and their parameters")
    k.add_argument("kind", nargs="?", help="one kind to describe in full")
    return top


def _render(args) -> int:
    from sim.patch import load_patch
    from sim.render import render

    patch = load_patch(args.patch, args.overrides)
    opts = RenderOptions(seconds=args.seconds, settle=args.settle, rate_hz=args.rate,
                         full_scale_volts=args.full_scale, normalize=args.normalize,
                         solver=args.solver, quality=args.quality, progress=not args.quiet)
    result = render(patch, args.out, opts)
    rep = result.report
    lis = rep["listen"]
    pitch = (f"{lis['freq_hz']:.3f} Hz ({lis['note']} {lis['cents']:+.2f} cents)"
             if lis["freq_hz"] else "no steady pitch")
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


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "render":
            return _render(args)
        return _kinds(args)
    except HalfrailError as error:
        print(f"halfrail: {error}", file=sys.stderr)
        return error.exit_status
    except KeyboardInterrupt:
        print("halfrail: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
