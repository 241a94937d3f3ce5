"""IEC 60063 E-series membership and IEC 60062 letter codes."""

import math

import pytest

from sim import eseries
from sim.units import parse_quantity


def test_coarser_series_are_subsets_of_finer_ones():
    # source: IEC 60063, from memory: E6 within E12 within E24; E48 within E96
    s = eseries.SERIES
    assert set(s["E6"]) < set(s["E12"]) < set(s["E24"])
    assert set(s["E48"]) < set(s["E96"])
    assert [len(s[name]) for name in s] == [6, 12, 24, 48, 96]


def test_e96_starts_and_ends_as_the_published_table():
    # source: IEC 60063 E96 table, from memory
    assert eseries.SERIES["E96"][:8] == (1.0, 1.02, 1.05, 1.07, 1.1, 1.13, 1.15, 1.18)
    assert eseries.SERIES["E96"][-4:] == (9.09, 9.31, 9.53, 9.76)


@pytest.mark.parametrize(("value", "series"), [
    (4.7e3, "E6"), (22e-9, "E6"), (8.2e3, "E12"), (39e3, "E12"), (5.1e3, "E24"),
    (4.99e3, "E96"), (1.0, "E6"), (10.0, "E6"), (4.8e3, None),
])
def test_a_value_is_named_by_the_coarsest_series_that_holds_it(value, series):
    # source: IEC 60063, from memory
    assert eseries.series_of(value) == series


@pytest.mark.parametrize(("value", "series", "nearest"), [
    (4.8e3, "E12", 4.7e3), (9.5e3, "E12", 10e3), (1.04, "E6", 1.0), (130.0, "E24", 130.0),
])
def test_nearest_picks_the_closest_series_value(value, series, nearest):
    assert eseries.nearest(value, series) == pytest.approx(nearest)


@pytest.mark.parametrize(("value", "unit", "code"), [
    # source: IEC 60062 letter-code examples, from memory
    (4.7e3, "ohm", "4k7"), (0.47, "ohm", "R47"), (4.7, "ohm", "4R7"), (1.5e6, "ohm", "1M5"),
    (100e3, "ohm", "100k"), (470.0, "ohm", "470R"), (2.2e-9, "F", "2n2"), (22e-9, "F", "22n"),
    (100e-9, "F", "100n"), (4.7e-6, "F", "4u7"), (470e-12, "F", "470p"),
])
def test_values_are_written_in_the_letter_code(value, unit, code):
    assert eseries.letter_code(value, unit) == code


@pytest.mark.parametrize("value", [4.7e3, 0.47, 1.5e6, 2.2e-9, 33e-9, 4.99e3, 120e3])
@pytest.mark.parametrize("unit", ["ohm", "F"])
def test_a_letter_code_reads_back_as_the_same_value(value, unit):
    code = eseries.letter_code(value, unit)
    assert math.isclose(parse_quantity(code, unit), value, rel_tol=1e-12)


@pytest.mark.parametrize("bad", [0.0, -1.0, math.inf])
def test_a_non_positive_value_has_no_series(bad):
    with pytest.raises(ValueError):
        eseries.series_of(bad)
