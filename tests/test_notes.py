"""Note names and frequencies in equal temperament (A4 = 440 Hz)."""

import math

import pytest

from sim.errors import HalfrailError
from sim.notes import cents_between, freq_of, note_name, note_number, note_of


def equal_tempered_hz(number: int) -> float:
    # source: ISO 16 (A4 = 440 Hz) and the definition of twelve-tone equal
    # temperament: f = 440 * 2**((n - 69) / 12) with A4 as note number 69
    return 440.0 * 2.0 ** ((number - 69) / 12)


@pytest.mark.parametrize("number", range(0, 128, 5))
def test_every_named_note_has_its_equal_tempered_frequency(number):
    assert freq_of(note_name(number)) == pytest.approx(equal_tempered_hz(number), rel=1e-12)


@pytest.mark.parametrize("number", range(0, 128, 7))
def test_an_exact_note_frequency_is_named_with_zero_cents(number):
    name, cents = note_of(equal_tempered_hz(number))
    assert name == note_name(number)
    assert abs(cents) < 1e-9


@pytest.mark.parametrize("name, hz, last_digit", [
    ("A4", 440.0, 1e-9),        # source: ISO 16 standard tuning frequency
    ("C4", 261.626, 0.001),     # from memory: equal-tempered tables (e.g. "Piano key frequencies")
    ("A0", 27.5, 1e-9),         # from memory: equal-tempered tables, lowest piano key
    ("C8", 4186.01, 0.01),      # from memory: equal-tempered tables, highest piano key
    ("A3", 220.0, 1e-9),        # from memory: equal-tempered tables
    ("E2", 82.4069, 0.0001),    # from memory: equal-tempered tables, guitar low E
])
def test_published_note_frequencies_are_reproduced(name, hz, last_digit):
    # A published value is rounded to its last digit: agree within half of it.
    assert freq_of(name) == pytest.approx(hz, abs=0.5 * last_digit)
    assert note_of(hz)[0] == name


def test_middle_c_is_note_sixty_in_scientific_pitch_notation():
    # common practice: scientific pitch notation numbers octaves from C, middle C = C4
    assert note_number("C4") == 60
    assert note_number("B3") == 59


@pytest.mark.parametrize("flat, sharp", [("Db4", "C#4"), ("Bb2", "A#2"), ("Eb5", "D#5"),
                                         ("Gb3", "F#3"), ("Ab1", "G#1")])
def test_flats_and_sharps_name_the_same_pitch(flat, sharp):
    assert freq_of(flat) == freq_of(sharp)


@pytest.mark.parametrize("spelled, same", [("Cb4", "B3"), ("B#3", "C4"), ("E#4", "F4"),
                                           ("a4", "A4"), ("c\u266f4", "C#4"), ("B\u266d2", "A#2")])
def test_enharmonic_and_lower_case_spellings_are_read(spelled, same):
    assert note_number(spelled) == note_number(same)


def test_names_use_sharps_and_negative_octaves_below_c0():
    assert note_of(freq_of("Db4"))[0] == "C#4"
    assert note_of(freq_of("B-1"))[0] == "B-1"
    assert note_of(equal_tempered_hz(11))[0] == "B-1"
    assert freq_of("C-1") == pytest.approx(equal_tempered_hz(0))


@pytest.mark.parametrize("offset_cents", [-49.9, -20.0, 0.0, 12.5, 49.9])
def test_cents_are_the_offset_from_the_nearest_note(offset_cents):
    name, cents = note_of(440.0 * 2.0 ** (offset_cents / 1200.0))
    assert name == "A4"
    assert cents == pytest.approx(offset_cents, abs=1e-9)


def test_a_pitch_half_way_between_notes_is_named_after_the_upper_one_50_cents_flat():
    name, cents = note_of(440.0 * 2.0 ** (50.0 / 1200.0))
    assert name == "A#4"
    assert cents == pytest.approx(-50.0, abs=1e-9)
    assert -50.0 <= cents < 50.0


def test_cents_between_is_1200_per_octave_and_antisymmetric():
    assert cents_between(440.0, 880.0) == pytest.approx(1200.0)
    assert cents_between(440.0, 466.1637615180899) == pytest.approx(100.0)
    assert cents_between(300.0, 200.0) == pytest.approx(-cents_between(200.0, 300.0))
    assert cents_between(261.0, 261.0) == 0.0


@pytest.mark.parametrize("bad", ["H4", "A", "4", "C##4", "Do4", "", "A4.5", "A 4"])
def test_unknown_note_names_are_rejected_with_the_accepted_form(bad):
    with pytest.raises(ValueError, match="Unknown note") as caught:
        freq_of(bad)
    assert "C#5" in str(caught.value) and "Db4" in str(caught.value)
    assert isinstance(caught.value, HalfrailError)


@pytest.mark.parametrize("bad_hz", [0.0, -440.0, math.nan, math.inf])
def test_a_frequency_that_is_not_positive_and_finite_has_no_note(bad_hz):
    with pytest.raises(ValueError):
        note_of(bad_hz)
    with pytest.raises(ValueError):
        cents_between(440.0, bad_hz)
