"""Standard part values: the IEC 60063 E-series and the IEC 60062 letter code.

A bill of materials names a value the way it is bought and marked: ``4.7 kΩ`` is in
the E12 series and marked ``4k7``; ``22 nF`` is in E6 and marked ``22n``.

- :func:`series_of` gives the coarsest E-series a value belongs to (``"E12"``), or
  ``None`` for a value off every series here;
- :func:`nearest` gives the closest value of a series;
- :func:`letter_code` writes a value in the IEC 60062 letter code (``4k7``, ``R47``,
  ``2n2``, ``1M5``), the letter standing for the decimal point.
"""

from __future__ import annotations

import math

#: source: IEC 60063 (preferred number series for resistors and capacitors), from
#: memory. E24 is listed, not computed: eight of its values (2.7, 3.0, 3.3, 3.6, 3.9,
#: 4.3, 4.7, 8.2) differ from the rounded 10^(i/24). E12 and E6 take every second and
#: every fourth value of E24.
E24 = (1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
       3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1)

#: Steps per decade of E96: its values are 10^(i/96) rounded to three significant
#: digits (source: IEC 60063, from memory; for E96 and E48 the rounding gives the table
#: exactly). E48 takes every second value.
E96_STEPS = 96


def _e96() -> tuple[float, ...]:
    return tuple(round(10.0 ** (i / E96_STEPS), 2) for i in range(E96_STEPS))


#: Series from coarsest to finest, each as its mantissas in [1, 10).
SERIES: dict[str, tuple[float, ...]] = {
    "E6": E24[::4],
    "E12": E24[::2],
    "E24": E24,
    "E48": _e96()[::2],
    "E96": _e96(),
}

#: Relative difference under which a value counts as a series value: far below the
#: 1 % step of E96's finest neighbours, far above the rounding of a parsed "4.7k".
MATCH_RELATIVE = 1e-6

#: IEC 60062 letters by unit and power of ten (the letter marks the decimal point).
#: source: IEC 60062 (R for ohms, k, M, G; p, n, u, m for farads), from memory; ``u``
#: stands for micro as part markings and patches write it in ASCII (common practice).
LETTERS: dict[str, dict[int, str]] = {
    "ohm": {0: "R", 3: "k", 6: "M", 9: "G"},
    "F": {-12: "p", -9: "n", -6: "u", -3: "m", 0: "F"},
    "H": {-9: "n", -6: "u", -3: "m", 0: "H"},
}

#: Significant digits kept in a letter code (E96 values have three).
CODE_DIGITS = 3


def mantissa(value: float) -> float:
    """``value`` scaled into [1, 10): ``4700.0`` -> ``4.7``. ``value`` must be positive."""
    if not value > 0 or not math.isfinite(value):
        raise ValueError(f"expected a positive finite value, got {value!r}")
    scaled = value / 10.0 ** math.floor(math.log10(value))
    if scaled >= 10.0 * (1.0 - MATCH_RELATIVE):  # 9.9999999 from rounding is 10: next decade
        scaled /= 10.0
    return scaled


def _in(series: tuple[float, ...], m: float) -> bool:
    return any(abs(m / s - 1.0) < MATCH_RELATIVE or abs(m / (10.0 * s) - 1.0) < MATCH_RELATIVE
               for s in series)


def series_of(value: float) -> str | None:
    """The coarsest E-series that contains ``value`` (``"E6"`` ... ``"E96"``), or None."""
    m = mantissa(value)
    for name, series in SERIES.items():
        if _in(series, m):
            return name
    return None


def nearest(value: float, series: str = "E24") -> float:
    """The value of ``series`` closest to ``value`` on a log scale (same unit as ``value``)."""
    if series not in SERIES:
        raise ValueError(f"Unknown series {series!r} (choices: {', '.join(SERIES)})")
    decade = 10.0 ** math.floor(math.log10(value))
    candidates = [s * decade * scale for s in SERIES[series] for scale in (0.1, 1.0, 10.0)]
    return min(candidates, key=lambda c: abs(math.log(c / value)))


def letter_code(value: float, unit: str) -> str:
    """``value`` (SI units) in the IEC 60062 letter code: ``4700, "ohm"`` -> ``"4k7"``.

    The letter marks the decimal point (``4k7``, ``2n2``, ``1M5``, ``R47``); a whole
    number ends with it (``100k``, ``470R``, ``22n``). Raises ValueError for a unit
    without letters here or a non-positive value.
    """
    if unit not in LETTERS:
        raise ValueError(f"Unknown unit {unit!r} for a letter code (units: {', '.join(LETTERS)})")
    if not value > 0 or not math.isfinite(value):
        raise ValueError(f"expected a positive finite value, got {value!r}")
    letters = LETTERS[unit]
    powers = sorted(letters)
    power = 3 * math.floor(math.log10(value) / 3)
    power = min(max(power, powers[0]), powers[-1])
    scaled = float(f"{value / 10.0 ** power:.{CODE_DIGITS}g}")
    if scaled >= 1000.0 and power < powers[-1]:
        power += 3
        scaled = float(f"{value / 10.0 ** power:.{CODE_DIGITS}g}")
    text = f"{scaled:.{CODE_DIGITS}g}"
    if "e" in text and scaled < 1.0:  # below the smallest letter: a plain number
        return f"{value:.{CODE_DIGITS}g}"
    if "e" in text:  # 1000 or more of the largest letter: write the digits out
        text = f"{scaled:.0f}"
    whole, _, fraction = text.partition(".")
    if whole == "0":
        whole = ""
    return f"{whole}{letters[power]}{fraction}"
