"""The render pipeline: its threads change when the work is done, never what comes out."""

from pathlib import Path

import numpy as np
import pytest

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
    wav = f"{patch.name}.wav"
    assert (one_dir / wav).read_bytes() == (many_dir / wav).read_bytes()


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
