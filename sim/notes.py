"""Note names and frequencies in twelve-tone equal temperament.

Reference pitch A4 = 440 Hz (ISO 16).  Names use scientific pitch notation: a letter
A-G, an optional accidental, and an octave number that changes between B and C
(C4 is middle C, A4 is 440 Hz; below C0 the octave is negative, e.g. ``B-1``).
Names produced here always use sharps; names read here may use sharps or flats.
"""

from __future__ import annotations

import math
import re

from sim.errors import HalfrailError

#: Standard tuning frequency of A4 in hertz (ISO 16).
A4_HZ = 440.0
#: MIDI-style number of A4: the numbering puts C-1 at 0, so C4 is 60 and A4 is 69.
A4_NUMBER = 69
#: Semitones per octave and cents per semitone in equal temperament.
SEMITONES_PER_OCTAVE = 12
CENTS_PER_SEMITONE = 100.0

_SHARP_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
_LETTER_SEMITONES = {"C": 0, "D": 2, "E": 4, "F": 5, "G": 7, "A": 9, "B": 11}
_ACCIDENTALS = {"": 0, "#": 1, "\u266f": 1, "b": -1, "\u266d": -1}
_NOTE_PATTERN = re.compile(r"^\s*([A-Ga-g])(#|b|\u266f|\u266d)?(-?\d+)\s*$")
_ACCEPTED_FORM = ("a letter A-G, an optional '#' or 'b', then an octave number "
                  "(e.g. A4, C#5, Db4, Bb2, B-1)")


class UnknownNoteError(HalfrailError, ValueError):
    """A note name could not be read (also a :class:`ValueError`)."""


def _check_frequency(freq_hz: float, what: str) -> float:
    value = float(freq_hz)
    if not math.isfinite(value) or value <= 0.0:
        raise ValueError(f"{what} must be a positive finite frequency in Hz, got {freq_hz!r}")
    return value


def note_number(name: str) -> int:
    """Return the note number of ``name`` (C4 = 60, A4 = 69; one step per semitone).

    Raises :class:`UnknownNoteError` (a ``ValueError``) for anything else.
    """
    match = _NOTE_PATTERN.match(name) if isinstance(name, str) else None
    if match is None:
        raise UnknownNoteError(f"Unknown note {name!r}: expected {_ACCEPTED_FORM}")
    letter, accidental, octave = match.groups()
    semitone = _LETTER_SEMITONES[letter.upper()] + _ACCIDENTALS[accidental or ""]
    return (int(octave) + 1) * SEMITONES_PER_OCTAVE + semitone


def freq_of(name: str) -> float:
    """Frequency in Hz of a note name such as ``"A3"``, ``"C#4"``, ``"Db4"``, ``"Bb2"``."""
    steps = note_number(name) - A4_NUMBER
    return A4_HZ * 2.0 ** (steps / SEMITONES_PER_OCTAVE)


def note_name(number: int) -> str:
    """Sharp-spelled scientific pitch name of note ``number`` (60 -> ``"C4"``)."""
    octave, semitone = divmod(int(number), SEMITONES_PER_OCTAVE)
    return f"{_SHARP_NAMES[semitone]}{octave - 1}"


def note_of(freq_hz: float) -> tuple[str, float]:
    """Nearest equal-tempered note of ``freq_hz`` and the offset from it in cents.

    Returns ``(name, cents)`` with ``cents`` in [-50, 50): a frequency exactly half
    way between two notes is named after the upper one, 50 cents flat.
    """
    freq = _check_frequency(freq_hz, "note_of: freq_hz")
    steps = SEMITONES_PER_OCTAVE * math.log2(freq / A4_HZ)
    number = math.floor(steps + 0.5)
    cents = CENTS_PER_SEMITONE * (steps - number)
    # Guard the half-open interval against the last bit of float rounding.
    if cents >= CENTS_PER_SEMITONE / 2:
        number, cents = number + 1, cents - CENTS_PER_SEMITONE
    elif cents < -CENTS_PER_SEMITONE / 2:
        number, cents = number - 1, cents + CENTS_PER_SEMITONE
    return note_name(number + A4_NUMBER), cents


def cents_between(f_a: float, f_b: float) -> float:
    """Interval from ``f_a`` up to ``f_b`` in cents: ``1200 * log2(f_b / f_a)``."""
    a = _check_frequency(f_a, "cents_between: f_a")
    b = _check_frequency(f_b, "cents_between: f_b")
    return SEMITONES_PER_OCTAVE * CENTS_PER_SEMITONE * math.log2(b / a)
