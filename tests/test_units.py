"""Reading and writing quantities: SI prefixes, IEC 60062 letter codes, unit symbols."""

from __future__ import annotations

import pytest

from sim.units import describe, format_quantity, parse_quantity


@pytest.mark.parametrize(("text", "unit", "expected"), [
    ("4.7k", "ohm", 4.7e3),    # source: SI brochure prefixes (k = 1e3)
    ("22n", "F", 22e-9),       # source: SI brochure prefixes (n = 1e-9)
    ("2.2u", "F", 2.2e-6),     # common practice: u for micro in ASCII
    ("2.2\u00b5", "F", 2.2e-6),  # source: SI brochure prefixes (micro, MICRO SIGN)
    ("2.2\u03bc", "F", 2.2e-6),  # source: Unicode GREEK SMALL LETTER MU used for micro
    ("100p", "F", 100e-12),    # source: SI brochure prefixes (p = 1e-12)
    ("1M", "ohm", 1e6),        # source: SI brochure prefixes (M = 1e6)
    ("1m", "s", 1e-3),         # source: SI brochure prefixes (m = 1e-3)
    ("1G", "ohm", 1e9),        # source: SI brochure prefixes (G = 1e9)
    ("4K7", "ohm", 4.7e3),     # common practice: part markings write K for kilo
])
def test_si_prefixes_scale_the_number(text, unit, expected):
    assert parse_quantity(text, unit) == expected


@pytest.mark.parametrize(("text", "unit", "expected"), [
    ("4k7", "ohm", 4.7e3),     # source: IEC 60062 letter code
    ("2n2", "F", 2.2e-9),      # source: IEC 60062 letter code
    ("1M5", "ohm", 1.5e6),     # source: IEC 60062 letter code
    ("R47", "ohm", 0.47),      # source: IEC 60062 letter code
    ("4R7", "ohm", 4.7),       # source: IEC 60062 letter code
    ("0R1", "ohm", 0.1),       # source: IEC 60062 letter code
    ("4p7", "F", 4.7e-12),     # source: IEC 60062 letter code
    ("470R", "ohm", 470.0),    # common practice: a trailing R marks ohms
    ("4V7", "V", 4.7),         # common practice: zener voltages are marked 4V7
    ("4k7Ω", "ohm", 4.7e3),    # source: IEC 60062 letter code, then the SI unit symbol
])
def test_letter_code_puts_the_decimal_point_where_the_letter_is(text, unit, expected):
    assert parse_quantity(text, unit) == expected


@pytest.mark.parametrize(("text", "unit", "expected"), [
    ("22nF", "F", 22e-9),         # source: SI brochure unit symbols (F)
    ("4.7kΩ", "ohm", 4.7e3),      # source: SI brochure unit symbols (Ω, U+03A9)
    ("4.7k\u2126", "ohm", 4.7e3),  # source: Unicode OHM SIGN U+2126
    ("4.7kohm", "ohm", 4.7e3),    # common practice: ohm spelled out
    ("4.7kohms", "ohm", 4.7e3),   # common practice: ohms spelled out
    ("4.7 kOhm", "ohm", 4.7e3),   # common practice: ohm spelled out, capitalised
    ("4.7 k", "ohm", 4.7e3),      # source: SI brochure (space between number and unit)
    ("4.7 kΩ", "ohm", 4.7e3),     # source: SI brochure (space between number and unit)
    ("10V", "V", 10.0),           # source: SI brochure unit symbols (V)
    ("9v", "V", 9.0),             # common practice: "9v battery"
    ("440Hz", "Hz", 440.0),       # source: SI brochure unit symbols (Hz)
    ("1.2kHz", "Hz", 1.2e3),      # source: SI brochure unit symbols (Hz)
    ("5ms", "s", 5e-3),           # source: SI brochure unit symbols (s)
    ("100uH", "H", 100e-6),       # source: SI brochure unit symbols (H)
    ("2mA", "A", 2e-3),           # source: SI brochure unit symbols (A)
    ("1mohm", "ohm", 1e-3),       # source: SI brochure prefixes (m is milli even before ohm)
    ("1Mohm", "ohm", 1e6),        # source: SI brochure prefixes (M is mega)
    ("0.05/V", "1/V", 0.05),      # source: SI brochure (per volt)
    ("0.5m A/V^2", "A/V^2", 0.5e-3),  # source: SI brochure prefixes
])
def test_a_unit_symbol_of_the_right_quantity_may_follow(text, unit, expected):
    assert parse_quantity(text, unit) == expected


@pytest.mark.parametrize(("value", "unit", "expected"), [
    (4700, "ohm", 4700.0),
    (2.2e-9, "F", 2.2e-9),
    ("1e-9", "F", 1e-9),
    ("-3", "V", -3.0),
    (".5", "", 0.5),
    ("  20 ", "", 20.0),
])
def test_plain_numbers_are_read_as_they_are(value, unit, expected):
    assert parse_quantity(value, unit) == expected


@pytest.mark.parametrize(("text", "expected"), [
    ("5%", 5.0),
    ("0.5 %", 0.5),
    ("5", 5.0),
    (1, 1.0),
])
def test_percentages_are_returned_in_percent(text, expected):
    assert parse_quantity(text, "%") == expected


@pytest.mark.parametrize(("text", "unit", "fragment"), [
    ("22nF", "ohm", "'22nF' is a capacitance in farads, but a resistance in ohms"),
    ("4.7kΩ", "F", "'4.7kΩ' is a resistance in ohms, but a capacitance in farads"),
    ("10V", "Hz", "'10V' is a voltage in volts, but a frequency in hertz"),
    ("5ms", "H", "'5ms' is a time in seconds, but an inductance in henries"),
    ("0.5V", "", "'0.5V' is a voltage in volts, but a plain number"),
    ("50%", "", "'50%' is a percentage, but a plain number"),
])
def test_a_unit_symbol_of_another_quantity_is_an_error(text, unit, fragment):
    with pytest.raises(ValueError, match=fragment):
        parse_quantity(text, unit)


@pytest.mark.parametrize(("text", "unit", "fragment"), [
    ("R47", "F", "'R47' uses R as the decimal point, which marks a resistance in ohms"),
    ("4V7", "ohm", "'4V7' uses V as the decimal point, which marks a voltage in volts"),
])
def test_a_decimal_point_letter_of_another_quantity_is_an_error(text, unit, fragment):
    with pytest.raises(ValueError, match=fragment):
        parse_quantity(text, unit)


@pytest.mark.parametrize(("value", "unit"), [
    ("4x7", "ohm"),
    ("1 meg", "ohm"),
    ("k", "ohm"),
    ("4.7k7", "ohm"),
    ("", "F"),
    ("   ", "F"),
    ("nan", "V"),
    ("inf", "V"),
    (float("nan"), "V"),
    (float("inf"), "V"),
    (True, ""),
    (None, "ohm"),
    ([1, 2], "ohm"),
    ("5m%", "%"),
    ("1e999", "V"),
])
def test_unreadable_values_are_errors_that_say_what_was_expected(value, unit):
    with pytest.raises(ValueError, match=describe(unit)):
        parse_quantity(value, unit)


def test_an_error_message_gives_examples_of_the_expected_notation():
    with pytest.raises(ValueError) as caught:
        parse_quantity("4x7", "ohm")
    assert "such as 4.7k or 4k7" in str(caught.value)


@pytest.mark.parametrize(("value", "unit", "expected"), [
    (4700.0, "ohm", "4.7 kΩ"),       # source: SI brochure (space, prefix, symbol)
    (2.2e-6, "F", "2.2 µF"),
    (22e-9, "F", "22 nF"),
    (1e6, "ohm", "1 MΩ"),
    (999.96, "ohm", "1 kΩ"),          # rounds up into the next prefix
    (0.001, "s", "1 ms"),
    (440.0, "Hz", "440 Hz"),
    (-0.25, "V", "-250 mV"),
    (0.0, "V", "0 V"),
    (0.5, "", "0.5"),
    (5.0, "%", "5 %"),
    (0.55e-3, "A/V^2", "550 µA/V²"),
])
def test_format_quantity_writes_engineering_prefixes_and_symbols(value, unit, expected):
    assert format_quantity(value, unit) == expected


@pytest.mark.parametrize(("value", "unit"), [
    (4700.0, "ohm"), (2.2e-6, "F"), (22e-9, "F"), (0.001, "s"), (440.0, "Hz"), (-0.25, "V"),
    (1.5e9, "ohm"), (4.7e-12, "F"),
])
def test_formatted_quantities_read_back_to_the_same_value(value, unit):
    assert parse_quantity(format_quantity(value, unit), unit) == pytest.approx(value, rel=1e-3)
