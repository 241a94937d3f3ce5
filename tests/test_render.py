"""The render pipeline: its threads change when the work is done, never what comes out."""

from pathlib import Path

import numpy as np
import pytest

import blocks
from sim import render as render_module
from sim.patch import load_patch
from sim.render import GROUND, RenderOptions, render, report_signal_names

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
OPTS = RenderOptions(seconds=0.25, settle=0.05, progress=False)


def _without_wall_time(report: dict) -> dict:
    return {**report, "solver": {k: v for k, v in report["solver"].items()
                                 if k != "wall_seconds"}}


@pytest.mark.parametrize("scenario", ["tri-square.yaml", "mixer.yaml"])
def test_a_render_is_the_same_to_the_bit_with_one_thread_or_several(scenario, tmp_path,
                                                                      monkeypatch):
    # common practice: parallel work gathered in a fixed order gives reproducible output
    patch = load_patch(SCENARIOS / scenario)
    outputs = []
    for threads in (1, render_module.RENDER_THREADS):
        monkeypatch.setattr(render_module, "RENDER_THREADS", threads)
        folder = tmp_path / f"threads-{threads}"
        outputs.append((render(patch, folder, OPTS), folder))
    (one, one_dir), (many, many_dir) = outputs
    assert _without_wall_time(one.report) == _without_wall_time(many.report)
    assert one.signals.keys() == many.signals.keys()
    for name in one.signals:
        assert np.array_equal(one.signals[name], many.signals[name])
    assert np.array_equal(one.audio_volts, many.audio_volts)
    for name in (f"{patch.name}.wav", f"{patch.name}.png", f"{patch.name}.spectrum.png"):
        assert (one_dir / name).read_bytes() == (many_dir / name).read_bytes()


@pytest.mark.parametrize("scenario", ["tri-square.yaml", "bridged.yaml", "saw.yaml"])
def test_a_render_is_the_same_to_the_bit_read_during_or_after_the_simulation(scenario, tmp_path,
                                                                             monkeypatch):
    # common practice: a reader that carries its state across the chunks of a growing
    # trace gives what it gives on the finished trace; two audio chunks with their seam
    opts = RenderOptions(seconds=1.3, settle=0.05, progress=False)
    patch = load_patch(SCENARIOS / scenario)
    outputs = []
    for streamed in (False, True):
        monkeypatch.setattr(render_module, "STREAM_DURING_SIMULATION", streamed)
        folder = tmp_path / f"streamed-{streamed}"
        outputs.append((render(patch, folder, opts), folder))
    (after, after_dir), (during, during_dir) = outputs
    assert _without_wall_time(after.report) == _without_wall_time(during.report)
    assert after.report["outputs"]  # the gates' peaks were read (all these patches have gates)
    for name in after.signals:
        assert np.array_equal(after.signals[name], during.signals[name])
    assert np.array_equal(after.audio_volts, during.audio_volts)
    for name in (f"{patch.name}.wav", f"{patch.name}.png", f"{patch.name}.spectrum.png"):
        assert (after_dir / name).read_bytes() == (during_dir / name).read_bytes()


@pytest.mark.parametrize("wall_per_chunk, beside", [(0.01, False), (0.05, True)])
def test_auto_reads_beside_the_simulation_only_when_it_is_slow(wall_per_chunk, beside,
                                                               monkeypatch):
    # The decision of STREAM_DURING_SIMULATION "auto", on a clock we set: chunks of
    # 0.25 s simulated taking 0.01 s (25x real time) are read after the simulation,
    # chunks taking 0.05 s (5x) beside it; the chunk during the imports does not count.
    from concurrent.futures import Future

    patch = load_patch(SCENARIOS / "tri-square.yaml")
    record = list(dict.fromkeys([*render_module._listened_names(patch),
                                 *render_module.load_record_names(patch)]))
    stream = render_module._TraceStream(patch, record, OPTS, always=False)
    imports = Future()
    stream.warm = imports
    job = Future()  # the reader's job, still running
    stream.launch = lambda: job
    clock = [0.0]
    monkeypatch.setattr(render_module.time, "perf_counter", lambda: clock[0])

    def chunk(end: float) -> None:
        times = np.linspace(end - 0.25, end, 5)
        stream.on_chunk(times, np.zeros((5, len(record))), np.full(5, 2))

    chunk(0.25)
    clock[0] += 1.0  # a slow chunk beside the imports: ignored
    chunk(0.5)
    imports.set_result(None)
    for end in (0.75, 1.0):
        clock[0] += wall_per_chunk
        chunk(end)
    assert (stream.job is job) == beside
    assert stream.active == beside


def test_a_simulation_failing_while_its_trace_is_read_stops_cleanly(tmp_path, monkeypatch):
    import threading

    from sim.errors import SolverError

    monkeypatch.setattr(render_module, "STREAM_DURING_SIMULATION", True)

    real = render_module.simulate_patch

    def fail_after_some_chunks(*args, on_chunk=None, **kwargs):
        def hook(times, values, orders):
            on_chunk(times, values, orders)
            if times[-1] > 0.6:
                raise SolverError("the solver could not converge at t = 600 ms (test)")
        return real(*args, on_chunk=hook, **kwargs)

    monkeypatch.setattr(render_module, "simulate_patch", fail_after_some_chunks)
    before = threading.active_count()
    with pytest.raises(SolverError, match="600 ms"):
        render(load_patch(SCENARIOS / "tri-square.yaml"), tmp_path / "out",
               RenderOptions(seconds=1.0, settle=0.05, progress=False))
    assert threading.active_count() == before
    assert not (tmp_path / "out").exists()


def test_an_error_in_the_reader_beside_the_simulation_surfaces(tmp_path, monkeypatch):
    def broken(self, *args):
        raise RuntimeError("reader broke (test)")

    monkeypatch.setattr(render_module._TraceStream, "_feed", broken)
    monkeypatch.setattr(render_module, "STREAM_DURING_SIMULATION", True)
    with pytest.raises(RuntimeError, match="reader broke"):
        render(load_patch(SCENARIOS / "tri-square.yaml"), tmp_path / "out",
               RenderOptions(seconds=1.0, settle=0.05, progress=False))
    assert not (tmp_path / "out").exists()


def test_the_signals_of_a_render_are_the_probes_listening_nets_and_supply():
    patch = load_patch(SCENARIOS / "tri-square.yaml")
    result = render(patch, write=False, opts=OPTS)
    assert list(result.signals) == [*report_signal_names(patch), GROUND]
    assert {"tri", "sq", "vdd"} <= set(result.signals)
    # the listening net is also a probe: measured once, reported twice, not shared
    assert result.report["listen"] == result.report["probes"]["tri"]
    assert result.report["listen"] is not result.report["probes"]["tri"]


def test_a_failed_simulation_leaves_no_file_and_no_thread_behind(tmp_path, monkeypatch):
    import threading

    from sim.errors import SolverError

    def fail(*args, **kwargs):
        raise SolverError("the solver could not converge (test)")

    monkeypatch.setattr(render_module, "simulate_patch", fail)
    before = threading.active_count()
    with pytest.raises(SolverError):
        render(load_patch(SCENARIOS / "tri-square.yaml"), tmp_path / "out", OPTS)
    assert threading.active_count() == before
    assert not (tmp_path / "out").exists()


def _between_harmonics_db(samples: np.ndarray, rate_hz: float, f0_hz: float,
                          half_width_hz: float = 8.0) -> float:
    """Energy away from every harmonic of f0 over the total (DC left out), in dB.

    Blackman-Harris 4-term window: highest sidelobe -92 dB (Harris, "On the use of
    windows for harmonic analysis with the discrete Fourier transform", Proc. IEEE 66,
    1978), so a periodic signal measures far below the limits used here.
    """
    n = samples.size
    k = np.arange(n) * 2.0 * np.pi / (n - 1)
    window = 0.35875 - 0.48829 * np.cos(k) + 0.14128 * np.cos(2 * k) - 0.01168 * np.cos(3 * k)
    spectrum = np.abs(np.fft.rfft((samples - samples.mean()) * window)) ** 2
    freqs = np.fft.rfftfreq(n, 1.0 / rate_hz)
    near = freqs < half_width_hz
    for harmonic in range(1, int(freqs[-1] / f0_hz) + 1):
        near |= np.abs(freqs - harmonic * f0_hz) <= half_width_hz
    return float(10.0 * np.log10(spectrum[~near].sum() / spectrum[1:].sum()))


def test_a_square_wave_render_is_periodic_to_far_below_hearing():
    """The oscillator's square output through the whole WAV path (steps, exact interval
    averages, decimation): every period alike, so its energy sits on the harmonics.

    source: Fourier series: a periodic signal has energy at multiples of its fundamental
    only. What lands between them is step-to-step error of the solver and aliasing of the
    edges; -80 dB is far below hearing at any sane level. (Measured: -85 dB; holding
    backward Euler for 10 us after each flip measured -79.5 dB and fails here.)
    """
    import dataclasses

    patch = load_patch(SCENARIOS / "tri-square.yaml")
    square = dataclasses.replace(patch, listen=dataclasses.replace(patch.listen, nets=("sq",)))
    result = render(square, write=False, opts=RenderOptions(seconds=1.2, progress=False))
    trim = int(0.1 * result.report["sample_rate"])  # leave the fades out
    floor = _between_harmonics_db(result.audio_volts[trim:-trim], result.report["sample_rate"],
                                  result.report["listen"]["freq_hz"])
    assert floor < -82.0


#: tri-square with a spare gate of the package, its input on gnd (probed, so its output net
#: is not a lone net): a gate input read as 0 V rather than from the trace.
SPARE_GATE = (SCENARIOS / "tri-square.yaml").read_text().replace(
    "parts:\n", "parts:\n  U1D: {kind: inverter, in: gnd, out: spare, chip: U1}\n").replace(
    "probes: [tri, sq]", "probes: [tri, sq, spare]")


@pytest.mark.parametrize("scenario", ["tri-square.yaml", "bridged.yaml", "spare-gate"])
def test_the_gates_output_currents_are_the_same_to_the_bit_in_one_compiled_pass(scenario,
                                                                                 tmp_path):
    # source: the same gate equations evaluated two ways; gate_output_amps (rows of
    # states through the kernel's evaluate_rows, in batches) is the reference
    if scenario == "spare-gate":
        path = tmp_path / "spare-gate.yaml"
        path.write_text(SPARE_GATE)
    else:
        path = SCENARIOS / scenario
    patch = load_patch(path)
    record = list(dict.fromkeys([*render_module._listened_names(patch),
                                 *render_module.load_record_names(patch)]))
    _, trace = render_module.simulate_patch(patch, OPTS, record)
    rate = OPTS.rate_hz * render_module.OVERSAMPLE
    fast = render_module.gate_current_trace(patch, trace, OPTS.settle, rate)
    first = trace.times.size - fast.times.size
    gates = render_module._gates(patch)
    kind = blocks.REGISTRY[render_module.GATE_KIND]
    rows = np.array([kind.row(part.values) + [0.0, 0.0] for _, part in gates])

    def volts(net):
        if net == GROUND:
            return np.zeros(trace.times.size - first)
        return trace.values[first:, trace.column(net)]

    vin = np.column_stack([volts(part.nets["in"][0]) for _, part in gates])
    vout = np.column_stack([volts(part.nets["out"][0]) for _, part in gates])
    reference = render_module.gate_output_amps(rows, vin, vout, volts("vdd"))
    assert np.array_equal(fast.values, reference)
    assert np.all(np.isfinite(reference)) and np.max(np.abs(reference)) > 0.0
    peaks = render_module.gate_peak_amps(patch, trace, OPTS.settle,
                                         OPTS.settle + OPTS.seconds, rate)
    _, averages = fast.uniform(rate, OPTS.settle, OPTS.settle + OPTS.seconds)
    assert np.array_equal(peaks, np.max(np.abs(averages), axis=0))


def test_the_progress_line_redraws_in_place_and_ends_full(capsys):
    # common practice: a terminal progress line returns the carriage at each redraw and
    # ends with a newline; the bar is full exactly at the end
    line = render_module.ProgressLine("osc", 4.0)
    for t in (0.0, 1.0, 4.0):
        line.show(t)
    line.close()
    err = capsys.readouterr().err
    draws = err.split("\r")[1:]
    assert len(draws) == 3 and err.endswith("\n")
    assert draws[0].startswith("osc:   0% [" + "." * line.WIDTH + "] 0.00/4.00")
    assert draws[1].startswith("osc:  25% [" + "#" * (line.WIDTH // 4))
    assert draws[2] == "osc: 100% [" + "#" * line.WIDTH + "] 4.00/4.00 s simulated\n"


def test_a_render_into_a_log_writes_no_progress_line(tmp_path, capsys):
    # common practice: redraws are for terminals; a captured standard error gets none
    long = RenderOptions(seconds=3.0, settle=0.05, progress=True)
    render(load_patch(SCENARIOS / "tri-square.yaml"), tmp_path, long, write=False)
    assert "simulated" not in capsys.readouterr().err
