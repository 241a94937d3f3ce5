"""Reading and writing quantities such as ``4.7k``, ``4k7``, ``22nF`` or ``4.7 kΩ``.

A quantity is written in one of three ways:

- a plain number: ``4700``, ``0.5``, ``1e-9`` (YAML numbers arrive here as floats);
- a number, an optional SI prefix and an optional unit symbol: ``4.7k``, ``22n``,
  ``2.2u``, ``2.2µF``, ``4.7 kΩ``, ``4.7kohm``, ``10V``, ``440Hz``, ``5ms``, ``100uH``;
- the IEC 60062 letter code, where the prefix letter stands for the decimal point:
  ``4k7`` (4.7k), ``2n2`` (2.2n), ``1M5`` (1.5M), ``4R7`` / ``R47`` / ``0R1`` (ohms, the
  letter R marks the point), ``4V7`` (volts, as zener diodes are marked); a unit
  symbol may follow (``4k7Ω``, ``2n2F``).

Prefixes: ``p n u µ m k M G`` (``K`` is read as kilo, as parts are often marked;
``1M`` is mega, ``1m`` is milli). A unit symbol that belongs to another quantity is an
error (``22nF`` for a resistance). Percentages (unit ``"%"``) read ``5``, ``5%`` and
``0.5 %``. Parsing is exact to the nearest double: ``"2.2u"`` gives the same float as
the literal ``2.2e-6``.
"""

from __future__ import annotations

import math
import numbers
import re
from decimal import Decimal, InvalidOperation

#: SI prefix letter -> power of ten.  source: SI brochure (9th edition), table 7.
PREFIX_EXPONENTS: dict[str, int] = {
    "p": -12,
    "n": -9,
    "u": -6,   # common practice: ASCII stand-in for micro
    "\u00b5": -6,  # MICRO SIGN
    "\u03bc": -6,  # GREEK SMALL LETTER MU
    "m": -3,
    "k": 3,
    "K": 3,    # common practice: part markings write 4K7
    "M": 6,
    "G": 9,
}

#: Unit -> letter that may stand for the decimal point besides the prefixes.
#: source: IEC 60062 letter code (R for ohms); common practice for V (zener 4V7).
POINT_LETTERS: dict[str, str] = {"ohm": "R", "V": "V"}

#: Unit symbol as written -> the unit it belongs to (matched exactly).
_SYMBOLS: dict[str, str] = {
    "\u03a9": "ohm",  # GREEK CAPITAL LETTER OMEGA
    "\u2126": "ohm",  # OHM SIGN
    "R": "ohm",      # common practice: 470R
    "F": "F",
    "V": "V",
    "v": "V",        # common practice: "9v battery"
    "A": "A",
    "Hz": "Hz",
    "s": "s",
    "H": "H",
    "A/V^2": "A/V^2",
    "A/V²": "A/V^2",
    "/V": "1/V",
    "1/V": "1/V",
    "%": "%",
}

#: Unit words matched without regard to case.
_WORDS: dict[str, str] = {"ohm": "ohm", "ohms": "ohm", "hz": "Hz"}

#: Unit -> (what it is, examples) for messages.
_DESCRIPTIONS: dict[str, tuple[str, str]] = {
    "ohm": ("a resistance in ohms", "4.7k or 4k7"),
    "F": ("a capacitance in farads", "22n or 2n2"),
    "V": ("a voltage in volts", "9 or 4.5V"),
    "A": ("a current in amperes", "10m or 2mA"),
    "Hz": ("a frequency in hertz", "440 or 1.2kHz"),
    "s": ("a time in seconds", "0.2 or 5ms"),
    "H": ("an inductance in henries", "100u or 1.5H"),
    "A/V^2": ("a transconductance factor in A/V^2", "0.5m"),
    "1/V": ("a coefficient in 1/V", "0.05"),
    "": ("a plain number", "0.5 or 20"),
    "%": ("a percentage", "5 or 5%"),
}

#: Unit -> symbol used by :func:`format_quantity`.
_DISPLAY: dict[str, str] = {"ohm": "Ω", "A/V^2": "A/V²"}

#: Prefix used by :func:`format_quantity` for each power of ten (engineering steps).
_DISPLAY_PREFIXES: dict[int, str] = {-12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k",
                                     6: "M", 9: "G"}

#: Significant digits :func:`format_quantity` shows unless asked otherwise.
DEFAULT_DIGITS = 3

_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_PLAIN = re.compile(rf"^(?P<number>{_NUMBER})\s*(?P<tail>.*)$")
_LETTER = re.compile(r"^(?P<sign>[+-]?)(?P<whole>\d*)(?P<letter>[^\W\d_])(?P<fraction>\d+)"
                     r"\s*(?P<tail>.*)$")


def describe(unit: str) -> str:
    """What a value of ``unit`` is, with examples.

    ``describe("ohm")`` -> ``"a resistance in ohms such as 4.7k or 4k7"``.
    """
    what, examples = _DESCRIPTIONS.get(unit, (f"a value in {unit}", "1.5"))
    return f"{what} such as {examples}"


def example(unit: str) -> str:
    """One example value of ``unit`` as a patch would write it: ``"ohm"`` -> ``"4.7k"``."""
    return _DESCRIPTIONS.get(unit, ("", "1.5"))[1].split()[0]


def symbol_unit(symbol: str) -> str | None:
    """The unit a symbol such as ``"kΩ"``'s ``"Ω"`` belongs to, or None if unknown."""
    if symbol in _SYMBOLS:
        return _SYMBOLS[symbol]
    return _WORDS.get(symbol.lower())


def _accepts(unit: str, symbol: str) -> bool:
    return symbol_unit(symbol) == unit or symbol == unit


def _wrong(text: str, unit: str) -> ValueError:
    return ValueError(f"'{text}' is not {describe(unit)}")


def _check_symbol(text: str, symbol: str, unit: str) -> None:
    """Raise unless ``symbol`` (may be empty) is a symbol of ``unit``."""
    if not symbol or _accepts(unit, symbol):
        return
    other = symbol_unit(symbol)
    if other is not None:
        what = _DESCRIPTIONS.get(other, (f"a value in {other}",))[0]
        raise ValueError(f"'{text}' is {what}, but {describe(unit)} is expected")
    raise _wrong(text, unit)


def _split_tail(text: str, tail: str, unit: str) -> tuple[int, str]:
    """Split what follows the number into (power of ten, unit symbol).

    ``"m"`` alone is milli, ``"ms"`` milli-second, ``"mohm"`` milli-ohm, ``"Hz"`` hertz.
    """
    tail = tail.strip()
    if not tail:
        return 0, ""
    first, rest = tail[0], tail[1:].strip()
    if first in PREFIX_EXPONENTS and (not rest or symbol_unit(rest) is not None
                                      or rest == unit):
        return PREFIX_EXPONENTS[first], rest
    if symbol_unit(tail) is not None or tail == unit:
        return 0, tail
    raise _wrong(text, unit)


def _finish(text: str, digits: str, power: int, symbol: str, unit: str) -> float:
    _check_symbol(text, symbol, unit)
    if unit == "%" and power:
        raise ValueError(f"'{text}' is not {describe(unit)} (no prefix on a percentage)")
    try:
        value = float(Decimal(digits).scaleb(power))
    except InvalidOperation as error:
        raise _wrong(text, unit) from error
    if not math.isfinite(value):
        raise ValueError(f"'{text}' is too large: expected {describe(unit)}")
    return value


def parse_quantity(value: object, unit: str) -> float:
    """Read ``value`` (a number or a string such as ``"4k7"``) as a float in SI units.

    ``unit`` is the quantity's unit symbol as kinds declare it (``"ohm"``, ``"F"``,
    ``"V"``, ``"A"``, ``"Hz"``, ``"s"``, ``"H"``, ``"A/V^2"``, ``"1/V"``, ``""`` for a
    plain number, ``"%"`` for a percentage, returned in percent: ``"5%"`` -> 5.0).

    Raises ValueError whose message quotes the value and says what was expected
    with examples, e.g. ``'22nF' is a capacitance in farads, but a resistance in ohms
    such as 4.7k or 4k7 is expected``.
    """
    if isinstance(value, bool):
        raise ValueError(f"'{value}' is not {describe(unit)}")
    if isinstance(value, numbers.Real):
        number = float(value)
        if not math.isfinite(number):
            raise ValueError(f"'{value}' is not a finite number: expected {describe(unit)}")
        return number
    if not isinstance(value, str):
        raise ValueError(f"'{value}' is not {describe(unit)}")
    text = value.strip()
    if not text:
        raise ValueError(f"the value is empty: expected {describe(unit)}")

    letter = _LETTER.match(text)
    if letter:
        mark = letter["letter"]
        if mark in PREFIX_EXPONENTS or mark == POINT_LETTERS.get(unit):
            power = PREFIX_EXPONENTS.get(mark, 0)
            digits = f"{letter['sign']}{letter['whole'] or '0'}.{letter['fraction']}"
            return _finish(text, digits, power, letter["tail"].strip(), unit)
        owner = next((u for u, point in POINT_LETTERS.items() if point == mark), None)
        if owner is not None:
            what = _DESCRIPTIONS[owner][0]
            raise ValueError(f"'{text}' uses {mark} as the decimal point, which marks "
                             f"{what}, but {describe(unit)} is expected")
    plain = _PLAIN.match(text)
    if not plain:
        raise _wrong(text, unit)
    power, symbol = _split_tail(text, plain["tail"], unit)
    return _finish(text, plain["number"], power, symbol, unit)


def format_quantity(value: float, unit: str, digits: int = DEFAULT_DIGITS) -> str:
    """Write ``value`` (SI units) for people: ``4700, "ohm"`` -> ``"4.7 kΩ"``.

    Uses an engineering prefix from p to G and ``digits`` significant digits;
    a plain number (unit ``""``) gets no prefix, a percentage reads ``"5 %"``.
    """
    if unit in ("", "%") or value == 0 or not math.isfinite(value):
        text = f"{value:.{digits}g}"
        return f"{text} %" if unit == "%" else (f"{text} {_DISPLAY.get(unit, unit)}"
                                                if unit else text)
    power = 3 * math.floor(math.log10(abs(value)) / 3)
    power = min(max(power, min(_DISPLAY_PREFIXES)), max(_DISPLAY_PREFIXES))
    mantissa = float(f"{value / 10.0 ** power:.{digits}g}")
    if abs(mantissa) >= 1000 and power < max(_DISPLAY_PREFIXES):
        power += 3
        mantissa = float(f"{value / 10.0 ** power:.{digits}g}")
    return f"{mantissa:.{digits}g} {_DISPLAY_PREFIXES[power]}{_DISPLAY.get(unit, unit)}"
