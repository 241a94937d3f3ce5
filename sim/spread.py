"""Tolerance spread: how the pitch of a patch varies over the parts in the bag.

:func:`spread` draws every toleranced parameter of every part (``Part.tolerance_pct``:
the kinds' defaults, resistors 5 %, capacitors 10 %, pots 20 %, the inverter's kn/kp
20 % and vtn/vtp 10 %, or the part's own ``tolerance:``), renders each drawn build
through :func:`sim.runner.run_jobs`, and reduces the renders to the pitch spread in
cents relative to the nominal render, the fraction of builds within a window, and the
sensitivity of the pitch to each parameter.

How parameters are drawn
    Uniformly within +-tolerance of the nominal value. A tolerance is a limit the maker
    guarantees, not a standard deviation; when only limits are known, a rectangular
    (uniform) distribution is the usual model (source: JCGM 100:2008, the GUM,
    4.3.7). It is the cautious choice: a normal law with the tolerance at 2 or 3 sigma
    would put most parts near nominal, which sorted and binned stock does not promise.

Gates of one package
    The gates of one hex inverter package share a die, so they match each other far
    better than chips from different lots. Each gate parameter is the sum of a draw
    shared by the package (uniform over ``1 - GATE_MISMATCH_FRACTION`` of the
    tolerance) and the gate's own draw (uniform over the rest); the sum stays within
    the tolerance. Gates are placed on packages as the build sheet places them
    (:func:`sim.sheet.assign_packages`).

Reproducibility
    Run k draws from its own stream, ``numpy.random.SeedSequence(seed).spawn(runs)[k]``,
    so its build is the same whatever ``--runs`` is (200 runs extend 50 runs) and the
    numbers are the same serial or parallel: the draws are made here, before any
    render, and each render is a pure function of its overrides.

Sensitivity
    One parameter at a time, by central differences: the parameter at +-1 %
    (SENSITIVITY_STEP_PCT) of its nominal value, every other part nominal; the pitch
    change over the 2 % step in cents per percent. Parameters that do not enter the
    circuit's equations (the behavioural gain of a gate in its transistor form) are
    found by evaluating the equations (:func:`inert_keys`) and neither drawn nor
    rendered.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import blocks
from sim import kernel, plots
from sim.canvas import Fill, Pen, Scale, padded
from sim.compile import compile_patch
from sim.errors import HalfrailError, UsageError
from sim.fileio import write_json
from sim.notes import cents_between, note_of
from sim.render import RenderOptions, listen_label
from sim.runner import LOCAL, Job, probe_measures, run_jobs
from sim.sheet import assign_packages

#: Builds drawn when none are asked for: each of the 5th and 95th percentiles then
#: rests on about five builds beyond it, enough for a builder's estimate.
DEFAULT_RUNS = 100

#: Seed used when none is given: fixed, so a spread of an edited patch draws the same
#: parts as before and the two spreads compare build by build. Any integer works.
DEFAULT_SEED = 1

#: Seconds kept of each build unless asked otherwise: only the pitch is measured, and
#: half a second holds 50 periods of a 100 Hz drone (the measure needs a few); the
#: render's own 1 s default costs twice as much for the same number.
BATCH_SECONDS = 0.5

#: Window (cents either side of the nominal pitch) a build must land in to count as
#: "within": 50 cents keeps it on the intended note name (the nearest semitone).
DEFAULT_WINDOW_CENTS = 50.0

#: Share of a gate parameter's tolerance drawn per gate; the rest is drawn once per
#: package. from memory: transistors on one die match to tens of millivolts of
#: threshold, while B-series thresholds differ by about a volt between makers and
#: lots; a tenth of the tolerance keeps that order of magnitude.
GATE_MISMATCH_FRACTION = 0.1

#: Step (percent of the nominal value) of the one-at-a-time sensitivity renders: small
#: enough that the pitch responds linearly (the curvature of a 1/x law adds 0.01 % to
#: a slope over +-1 %), large enough that even a weak part moves the pitch far above
#: the measurement's resolution (hundredths of a cent).
SENSITIVITY_STEP_PCT = 1.0

#: The percentiles reported.
LOW_PERCENTILE, HIGH_PERCENTILE = 5.0, 95.0

#: States at which :func:`inert_keys` compares the equations, the seed of their draw
#: and how far beyond the rails they reach (volts; past the input clamps' knee so the
#: clamp parameters count) and the branch currents' range (amperes).
INERT_STATES = 16
INERT_SEED = 2024
INERT_MARGIN_VOLTS = 1.0
INERT_BRANCH_AMPS = 1e-2
#: Times (s) at which the equations are compared: within the supply's power-on ramp,
#: and in steady state at times that are not multiples of any round period.
INERT_TIMES = (3.7e-4, 0.0123, 0.4567)

#: Histogram bins per run count: about sqrt(runs) bins, at least this many.
MIN_BINS = 10


class NoPitchError(HalfrailError):
    """The nominal render has no steady pitch at the probe, so nothing can be compared."""


# ---------------------------------------------------------------------------------
# which probe is measured


def check_probe(patch, probe: str | None) -> str | None:
    """``probe`` if ``patch`` measures it, None for the listening signal.

    A net is measured when the patch probes it or listens to it alone. Raises
    UsageError listing the nets that are measured.
    """
    if probe is None:
        return None
    if probe in patch.probes:
        return probe
    if patch.listen.part is None and patch.listen.nets == (probe,):
        return None
    raise UsageError(f"--probe {probe}: the patch does not measure this net (probes: "
                     f"{', '.join(patch.probes) or 'none'}); add it to probes: in the patch")


def probe_freq(report: dict, probe: str | None) -> float | None:
    """Pitch (Hz) of a render report at ``probe`` (None: the listening signal), or None."""
    return probe_measures(report, probe)["freq_hz"]


def probe_label(patch, probe: str | None) -> str:
    """What is measured, for reports: the net, or the listening signal's label."""
    return probe if probe is not None else listen_label(patch)


def base_overrides(patch) -> tuple[str, ...]:
    """The patch's own ``--set`` overrides, to repeat in every job of a batch."""
    return tuple(patch.overrides)


def override(key: str, value: float) -> str:
    """``"REF.param=value"`` with the value written exactly (``repr`` of the float)."""
    return f"{key}={float(value)!r}"


def cents_or_nan(freq_hz: float | None, reference_hz: float) -> float:
    """Cents from ``reference_hz`` up to ``freq_hz``; NaN when there is no pitch."""
    return cents_between(reference_hz, freq_hz) if freq_hz else math.nan


# ---------------------------------------------------------------------------------
# what varies


@dataclass(frozen=True)
class Varied:
    """One toleranced parameter of one part.

    key: ``"REF.param"``; nominal: its value in SI units; tolerance_pct: +- percent;
    package: the package whose gates share part of the draw (None for other parts);
    minimum, maximum: the parameter's bounds (None when unbounded).
    """

    key: str
    nominal: float
    tolerance_pct: float
    package: str | None = None
    minimum: float | None = None
    maximum: float | None = None

    def clip(self, value: float) -> float:
        """``value`` kept within the parameter's bounds."""
        if self.minimum is not None:
            value = max(value, self.minimum)
        if self.maximum is not None:
            value = min(value, self.maximum)
        return value


def _all_parts(patch):
    yield patch.supply
    yield from patch.parts.values()


def toleranced(patch) -> list[Varied]:
    """Every numeric parameter of ``patch`` with a tolerance above 0 %, in patch order.

    Includes parameters that may turn out inert; see :func:`varied_parameters`.
    """
    package_of = {gate.ref: name for name, package in assign_packages(patch).items()
                  for gate in package.gates.values()}
    out = []
    for part in _all_parts(patch):
        kind = blocks.REGISTRY[part.kind]
        for name, pct in part.tolerance_pct.items():
            value = part.values[name]
            if pct <= 0.0 or not isinstance(value, float) or value == 0.0:
                continue
            param = kind.param(name)
            out.append(Varied(key=f"{part.ref}.{name}", nominal=value, tolerance_pct=pct,
                              package=package_of.get(part.ref), minimum=param.minimum,
                              maximum=param.maximum))
    return out


def _equations(circuit, states: np.ndarray) -> list[np.ndarray]:
    """The circuit's currents ``f`` at each state and time, (states, n) per time."""
    k = kernel.load()
    out = []
    for t in INERT_TIMES:
        f = np.zeros_like(states)
        k.evaluate_rows(states, t, circuit.pf, circuit.nf, circuit.tab, circuit.df, f)
        out.append(f)
    return out


def inert_keys(patch, varied: list[Varied]) -> set[str]:
    """Keys whose change by SENSITIVITY_STEP_PCT leaves the circuit's equations unchanged.

    The circuit is compiled with and without the change and its currents compared at
    INERT_STATES random states (voltages up to INERT_MARGIN_VOLTS beyond the rails) at
    INERT_TIMES, with its capacitances, data and step limits: a parameter the
    equations do not read changes none of them. A parameter whose setting changes
    another value of its part also counts as inert here: it belongs to another form of
    the part (setting a gate's behavioural ``gain`` switches a transistor-form gate to
    its behavioural form), which a tolerance must not do.
    """
    base = compile_patch(patch)
    rng = np.random.default_rng(INERT_SEED)
    volts = base.supply_volts
    states = rng.uniform(-INERT_MARGIN_VOLTS, volts + INERT_MARGIN_VOLTS,
                         (INERT_STATES, base.size))
    states[:, ~base.is_volt] = rng.uniform(-INERT_BRANCH_AMPS, INERT_BRANCH_AMPS,
                                           (INERT_STATES, int(np.sum(~base.is_volt))))
    states[:, 0] = 0.0
    reference = _equations(base, states)
    inert = set()
    for item in varied:
        ref, _, name = item.key.partition(".")
        variant = patch.variant(
            {item.key: item.clip(item.nominal * (1.0 + SENSITIVITY_STEP_PCT / 100.0))})
        part = variant.supply if ref == variant.supply.ref else variant.parts[ref]
        nominal = patch.supply if ref == patch.supply.ref else patch.parts[ref]
        if any(part.values[k] != v for k, v in nominal.values.items() if k != name):
            inert.add(item.key)  # setting it changes the part's form: not this form's
            continue
        moved = compile_patch(variant)
        same = (np.array_equal(moved.mass, base.mass) and np.array_equal(moved.df, base.df)
                and moved.max_step_seconds == base.max_step_seconds
                and all(np.array_equal(a, b)
                        for a, b in zip(_equations(moved, states), reference)))
        if same:
            inert.add(item.key)
    return inert


def varied_parameters(patch) -> list[Varied]:
    """The parameters a spread draws: toleranced (:func:`toleranced`) and not inert."""
    candidates = toleranced(patch)
    inert = inert_keys(patch, candidates)
    return [item for item in candidates if item.key not in inert]


def draw_values(varied: list[Varied], runs: int, seed: int) -> np.ndarray:
    """Drawn values (SI units) of every varied parameter in every run, shape (runs, p).

    Run k uses the k-th child of ``SeedSequence(seed)``: per run, first one uniform
    draw in [-1, 1] per parameter (the part's own), then one per (package, parameter
    name) shared by the gates of a package, in order of first appearance (see the
    module docstring).
    """
    groups = list(dict.fromkeys((v.package, v.key.partition(".")[2])
                                for v in varied if v.package is not None))
    group_of = [groups.index((v.package, v.key.partition(".")[2]))
                if v.package is not None else -1 for v in varied]
    values = np.empty((runs, len(varied)))
    for run, child in enumerate(np.random.SeedSequence(seed).spawn(runs)):
        rng = np.random.default_rng(child)
        own = rng.uniform(-1.0, 1.0, len(varied))
        shared = rng.uniform(-1.0, 1.0, len(groups))
        for j, item in enumerate(varied):
            unit = own[j]
            if group_of[j] >= 0:
                unit = ((1.0 - GATE_MISMATCH_FRACTION) * shared[group_of[j]]
                        + GATE_MISMATCH_FRACTION * own[j])
            values[run, j] = item.clip(item.nominal * (1.0 + item.tolerance_pct / 100.0 * unit))
    return values


# ---------------------------------------------------------------------------------
# the spread


@dataclass
class SpreadResult:
    """What :func:`spread` measured.

    report: the ``<patch>.spread.json`` content; varied: the drawn parameters;
    values: (runs, p) their drawn values (SI units); cents: (runs,) each build's pitch
    relative to nominal (NaN where a build had no steady pitch); renders: how many
    renders it took; wall_seconds: how long they took; paths: files written.
    """

    patch: object
    report: dict
    varied: list[Varied]
    values: np.ndarray
    cents: np.ndarray
    renders: int = 0
    wall_seconds: float = 0.0
    paths: list[Path] = field(default_factory=list)


def _sensitivity_jobs(patch, varied: list[Varied], opts: RenderOptions, base: tuple[str, ...]
                      ) -> tuple[list[Job], list[tuple[float, float]]]:
    """Two jobs per parameter (its value at +- the step) and each one's offset in percent."""
    jobs, steps = [], []
    for item in varied:
        up = item.clip(item.nominal * (1.0 + SENSITIVITY_STEP_PCT / 100.0))
        down = item.clip(item.nominal * (1.0 - SENSITIVITY_STEP_PCT / 100.0))
        for value in (up, down):
            jobs.append(Job(patch.path, base + (override(item.key, value),), opts))
        steps.append((100.0 * (up / item.nominal - 1.0), 100.0 * (down / item.nominal - 1.0)))
    return jobs, steps


def spread(patch, runs: int = DEFAULT_RUNS, seed: int = DEFAULT_SEED, probe: str | None = None,
           window_cents: float = DEFAULT_WINDOW_CENTS, opts: RenderOptions | None = None,
           workers: int | None = None, executor: str = LOCAL, sensitivity: bool = True,
           progress: bool = True) -> SpreadResult:
    """Render ``runs`` builds of ``patch`` drawn from its tolerances and reduce them.

    probe: a measured net (None: the listening signal); window_cents: half-width of the
    window around the nominal pitch; opts: render options of every build; workers,
    executor: see :func:`sim.runner.run_jobs`; sensitivity: also render the
    one-at-a-time sensitivity (two renders per varied parameter). opts defaults to
    render's options with BATCH_SECONDS kept. Nothing is written
    (see :func:`write_spread`). Raises UsageError for bad options, NoPitchError when
    the nominal render has no steady pitch.
    """
    opts = opts or RenderOptions(seconds=BATCH_SECONDS)
    if not (isinstance(runs, int) and runs >= 1):
        raise UsageError(f"--runs must be a whole number of at least 1, got {runs!r}")
    if not (isinstance(seed, int) and seed >= 0):
        raise UsageError(f"--seed must be a whole number of at least 0, got {seed!r}")
    if not (window_cents > 0 and math.isfinite(window_cents)):
        raise UsageError(f"--window must be a positive number of cents, got {window_cents!r}")
    probe = check_probe(patch, probe)
    varied = varied_parameters(patch)
    values = draw_values(varied, runs, seed)
    base = base_overrides(patch)
    label = probe_label(patch, probe)
    started = time.perf_counter()
    # the nominal build first, here: a patch without a pitch fails before the batch
    nominal = run_jobs([Job(patch.path, base, opts)], workers=1, executor=executor,
                       progress=False)[0]
    nominal_hz = probe_freq(nominal, probe)
    if not nominal_hz:
        raise NoPitchError(f"{patch.name}: the nominal render has no steady pitch at {label}, "
                           "so there is no pitch to spread around (try --probe, or --seconds)")
    jobs = [Job(patch.path, base + tuple(override(v.key, x) for v, x in zip(varied, row)), opts)
            for row in values]
    sens_jobs, steps = _sensitivity_jobs(patch, varied, opts, base) if sensitivity else ([], [])
    reports = run_jobs(jobs + sens_jobs, workers=workers, executor=executor, progress=progress,
                       label=f"{patch.name} spread")
    wall_seconds = time.perf_counter() - started
    freqs = [probe_freq(r, probe) for r in reports[:runs]]
    cents = np.array([cents_or_nan(f, nominal_hz) for f in freqs])
    pitched = cents[np.isfinite(cents)]
    stats = {"median": None, "p5": None, "p95": None}
    if pitched.size:
        stats = {"median": float(np.median(pitched)),
                 "p5": float(np.percentile(pitched, LOW_PERCENTILE)),
                 "p95": float(np.percentile(pitched, HIGH_PERCENTILE))}
    within = float(np.sum(np.abs(pitched) <= window_cents)) / runs
    slopes = {}
    sens_reports = reports[runs:]
    for j, (item, (up_pct, down_pct)) in enumerate(zip(varied, steps)):
        up = cents_or_nan(probe_freq(sens_reports[2 * j], probe), nominal_hz)
        down = cents_or_nan(probe_freq(sens_reports[2 * j + 1], probe), nominal_hz)
        slope = (up - down) / (up_pct - down_pct) if up_pct != down_pct else math.nan
        slopes[item.key] = slope if math.isfinite(slope) else None
    note, note_cents = note_of(nominal_hz)
    report = {
        "patch": patch.name,
        "runs": runs,
        "seed": seed,
        "probe": label,
        "nominal_hz": nominal_hz,
        "nominal_note": note,
        "nominal_cents": note_cents,
        "freq_hz": freqs,
        "cents": stats,
        "within": {"window_cents": window_cents, "fraction": within},
        "sensitivity": slopes,
        "no_pitch_runs": int(runs - pitched.size),
        "tolerance_pct": {v.key: v.tolerance_pct for v in varied},
        "method": {
            "draw": "uniform within +-tolerance (JCGM 100:2008, 4.3.7)",
            "gate_mismatch_fraction": GATE_MISMATCH_FRACTION,
            "sensitivity": (f"one at a time, central difference at +-{SENSITIVITY_STEP_PCT:g} %"
                            if sensitivity else "not computed"),
        },
        "seconds": opts.seconds,
        "settle_seconds": opts.settle,
        "overrides": list(base),
    }
    return SpreadResult(patch=patch, report=report, varied=varied, values=values, cents=cents,
                        renders=1 + len(reports), wall_seconds=wall_seconds)


# ---------------------------------------------------------------------------------
# output


#: The histogram's percentile lines and their dashes: the median solid, the 5th and
#: 95th percentiles dotted (the ends of the middle 90 %), 1.5 pixels wide.
PERCENTILE_LINES = {"p5": "dotted", "median": "solid", "p95": "dotted"}
PERCENTILE_WIDTH_PX = 1.5
#: The histogram's axes reach this fraction of the data's span beyond it (bars and lines
#: stay clear of the axis lines).
HISTOGRAM_MARGIN = 0.05
#: Shade of the "within" window: a pale tint of the bars' blue, behind the grid.
WINDOW_COLOUR = "#e8eef5"
#: White outlines part neighbouring bars (1 pixel).
BAR_EDGE_PEN = Pen("white", 1.0)


def histogram_plot(path: str | os.PathLike, cents: np.ndarray, report: dict) -> None:
    """Histogram of the builds' pitch in cents from nominal (``cents``: shape ``(runs,)``,
    NaN for a build without a pitch), with the percentiles and the window shaded."""
    pitched = cents[np.isfinite(cents)]
    window = report["within"]["window_cents"]
    stats = report["cents"]
    counts, edges = np.zeros(0), np.zeros(0)
    if pitched.size:
        counts, edges = np.histogram(pitched, bins=max(MIN_BINS, round(math.sqrt(pitched.size))))
    low, high = plots.finite_range(edges, [-window, window],
                                   [stats[name] for name in PERCENTILE_LINES if pitched.size])
    sheet = plots.new_sheet(plots.HEIGHT_BASE_IN + 2 * plots.HEIGHT_PER_TRACE_IN)
    (box,) = plots.panel_boxes(sheet, plots.MARGIN_TITLES_IN + plots.LEGEND_ROW_IN)
    panel = sheet.panel(*box, x=Scale(*padded(low, high, HISTOGRAM_MARGIN)),
                        y=Scale(0.0, max(1.0, float(counts.max(initial=0.0))) *
                                (1.0 + HISTOGRAM_MARGIN), integer=True))
    span = Fill(WINDOW_COLOUR)
    panel.vspan(-window, window, span.colour)
    panel.grid(plots.GRID_PEN)
    entries = [(f"within +-{window:g} cents: {report['within']['fraction']:.0%}", span)]
    if pitched.size:
        panel.bars(edges, counts, plots.TRACE_COLOURS[0], edge=BAR_EDGE_PEN)
        for name, dash in PERCENTILE_LINES.items():
            pen = Pen(plots.TRACE_COLOURS[1], PERCENTILE_WIDTH_PX, dash)
            panel.vline(stats[name], pen)
            entries.append((f"{name} {stats[name]:+.1f} cents", pen))
    panel.axes("pitch relative to the nominal build (cents)", "builds")
    panel.legend(entries)
    plots.titles(sheet, f"{report['patch']}: {report['runs']} builds drawn from the tolerances "
                        f"(seed {report['seed']}) at {report['probe']}; nominal "
                        f"{report['nominal_hz']:.2f} Hz")
    plots.save(sheet, path)


def write_spread(result: SpreadResult, out_dir: str | os.PathLike = "renders") -> list[Path]:
    """Write ``<patch>.spread.json`` and ``<patch>.spread.png`` into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    name = result.report["patch"]
    png = out / f"{name}.spread.png"
    histogram_plot(png, result.cents, result.report)
    js = write_json(out / f"{name}.spread.json", result.report)
    result.paths = [js, png]
    return result.paths


def ranked_sensitivity(result: SpreadResult) -> list[tuple[str, float, float]]:
    """``(key, cents per percent, RMS cents from its tolerance)``, largest effect first.

    The RMS is the slope times the standard deviation of a uniform draw over
    +-tolerance (tolerance / sqrt(3)): what that part alone adds to the spread.
    """
    tolerance = result.report["tolerance_pct"]
    rows = [(key, slope, abs(slope) * tolerance[key] / math.sqrt(3.0))
            for key, slope in result.report["sensitivity"].items() if slope is not None]
    return sorted(rows, key=lambda row: -row[2])
