"""Every demo patch loads, renders as it is, and says what a builder would expect of it."""

from pathlib import Path

import pytest

from sim.patch import load_patch
from sim.render import RenderOptions, render

SCENARIOS = sorted((Path(__file__).resolve().parents[1] / "scenarios").glob("*.yaml"))
SHORT = RenderOptions(seconds=0.25, settle=0.05, progress=False)


@pytest.fixture(scope="module", params=SCENARIOS, ids=lambda p: p.stem)
def rendered(request):
    return render(load_patch(request.param), write=False, opts=SHORT)


def test_there_are_demo_scenarios():
    assert len(SCENARIOS) >= 5


def test_each_scenario_renders_without_warnings(rendered):
    assert rendered.report["warnings"] == []


def test_each_scenario_draws_battery_current_and_sags_the_rail_a_little(rendered):
    supply = rendered.report["supply"]
    # common practice: an unbuffered gate biased in its linear region draws mA from 9 V
    assert 0.5 < supply["mean_ma"] < 50
    assert 8.9 < supply["volts_min"] < 9.0


@pytest.mark.parametrize("name, net", [("tri-square", "sq"), ("saw", "sq"), ("amp", "out")])
def test_tone_scenarios_have_a_steady_pitch(name, net):
    result = render(load_patch(Path(__file__).resolve().parents[1] / "scenarios" / f"{name}.yaml"),
                    write=False, opts=SHORT)
    assert result.report["probes"][net]["freq_hz"] is not None
