"""The drawing kit (sim/canvas.py): PNG files, where things land, ticks, dashes, clipping,
text, writing in place; and the plots' point reduction (sim/plots.envelope)."""

import math
import pathlib
import struct
import threading
import zlib

import numpy as np
import pytest
from PIL import Image

from sim import canvas, fileio, plots
from sim.canvas import (DASHES, TICK_LADDER, Marker, Pen, Scale, Sheet, log_ticks, nice_ticks,
                        tick_labels)

#: A sheet and a panel on it whose edges fall on whole pixels (so no pixel is shared
#: between the inside and the outside after the supersampled picture is reduced).
SHEET_W, SHEET_H = 400, 300
BOX = (50, 40, 350, 260)
LEFT, TOP, RIGHT, BOTTOM = BOX
#: Colours the tests look for: far from white, grey and each other.
RED, BLUE = "#ff0000", "#0000ff"
#: Tolerance on where a line lands, in pixels: the axis transform's position rounds to
#: a pixel row, and a line 1 pixel wide may straddle two.
LANDING_PX = 1.0
#: A pixel counts as inked when a channel differs from white by more than this.
INK_LEVEL = 60


def drawn(tmp_path, draw, name="t.png", size=(SHEET_W, SHEET_H)) -> np.ndarray:
    """Make a sheet, let ``draw(sheet)`` draw on it, write it and read the PNG back
    (with Pillow, an independent reader): pixels of shape (height, width, 3), uint8."""
    sheet = Sheet(*size)
    draw(sheet)
    path = tmp_path / name
    sheet.save(path, plots.PNG_COMPRESS_LEVEL)
    with Image.open(path) as image:
        return np.asarray(image.convert("RGB")).astype(int)


def redness(pixels: np.ndarray) -> np.ndarray:
    """How red each pixel is: red minus the mean of green and blue (any leading shape)."""
    return pixels[..., 0] - (pixels[..., 1] + pixels[..., 2]) / 2.0


def inked(pixels: np.ndarray) -> np.ndarray:
    """Pixels that are not (nearly) white, as booleans of shape (height, width)."""
    return np.any(pixels < 255 - INK_LEVEL, axis=-1)


# -- the PNG file -------------------------------------------------------------------


def png_chunks(data: bytes) -> list[tuple[bytes, bytes, int]]:
    """``(type, data, crc)`` of each chunk after the signature."""
    chunks, at = [], 8
    while at < len(data):
        (length,) = struct.unpack(">I", data[at:at + 4])
        kind, body = data[at + 4:at + 8], data[at + 8:at + 8 + length]
        (crc,) = struct.unpack(">I", data[at + 8 + length:at + 12 + length])
        chunks.append((kind, body, crc))
        at += 12 + length
    return chunks


def test_the_png_written_has_the_signature_and_a_header_of_the_sheets_size(tmp_path):
    sheet = Sheet(321, 123)
    sheet.save(tmp_path / "s.png", plots.PNG_COMPRESS_LEVEL)
    data = (tmp_path / "s.png").read_bytes()
    # source: ISO/IEC 15948:2004 (PNG), 5.2 signature, 5.3 chunk layout (length, type,
    # data, CRC-32 of type and data), 11.2.2 IHDR (width, height, bit depth 8, colour
    # type 2 truecolour, methods 0, no interlace), IHDR first and IEND last
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    chunks = png_chunks(data)
    assert chunks[0][0] == b"IHDR" and chunks[-1][0] == b"IEND"
    assert struct.unpack(">IIBBBBB", chunks[0][1]) == (321, 123, 8, 2, 0, 0, 0)
    assert all(zlib.crc32(kind + body) == crc for kind, body, crc in chunks)
    assert any(kind == b"IDAT" for kind, _, _ in chunks)


def test_the_png_decodes_to_the_pixels_of_the_sheet(tmp_path):
    sheet = Sheet(SHEET_W, SHEET_H)
    panel = sheet.panel(*BOX, x=Scale(0.0, 1.0), y=Scale(0.0, 1.0))
    panel.line(np.linspace(0.0, 1.0, 50), np.linspace(0.0, 1.0, 50) ** 2, Pen(RED, 2.0))
    sheet.text(10, 10, "decoded", bold=True)
    sheet.save(tmp_path / "d.png", plots.PNG_COMPRESS_LEVEL)
    # source: ISO/IEC 15948:2004, 9 (filtering) and 10 (deflate): read back here by
    # Pillow's decoder, an implementation of its own
    with Image.open(tmp_path / "d.png") as image:
        decoded = np.asarray(image.convert("RGB"))
    expected = np.asarray(sheet.image())
    assert np.array_equal(decoded, expected) and inked(expected).any()


# -- where things land ------------------------------------------------------------------


@pytest.mark.parametrize("value", [0.7, 3.7, 5.0, 9.2])
def test_a_horizontal_line_lands_on_the_row_of_its_value(tmp_path, value):
    low, high = 0.0, 10.0
    pixels = drawn(tmp_path, lambda sheet: sheet.panel(
        *BOX, x=Scale(0.0, 1.0), y=Scale(low, high)).hline(value, Pen(RED, 1.0)))
    column = redness(pixels[:, (LEFT + RIGHT) // 2])
    # common practice: a linear scale puts v at top + (high - v) / (high - low) * height
    expected = TOP + (high - value) / (high - low) * (BOTTOM - TOP)
    assert abs(np.argmax(column) + 0.5 - expected) <= LANDING_PX


@pytest.mark.parametrize("value", [0.05, 0.33, 0.5, 0.91])
def test_a_vertical_line_lands_on_the_column_of_its_value(tmp_path, value):
    pixels = drawn(tmp_path, lambda sheet: sheet.panel(
        *BOX, x=Scale(0.0, 1.0), y=Scale(0.0, 1.0)).vline(value, Pen(RED, 1.0)))
    row = redness(pixels[(TOP + BOTTOM) // 2])
    # common practice: a linear scale puts v at left + (v - low) / (high - low) * width
    expected = LEFT + value * (RIGHT - LEFT)
    assert abs(np.argmax(row) + 0.5 - expected) <= LANDING_PX


LOG_VALUES = (2.0, 20.0, 200.0)


def log_rows(tmp_path) -> list[float]:
    """Rows of lines at LOG_VALUES on a log axis from 1 to 1000."""
    def draw(sheet):
        panel = sheet.panel(*BOX, x=Scale(0.0, 1.0), y=Scale(1.0, 1000.0, log=True))
        for value in LOG_VALUES:
            panel.hline(value, Pen(RED, 1.0))

    column = redness(drawn(tmp_path, draw)[:, (LEFT + RIGHT) // 2])
    return [float(r) for r in np.flatnonzero(column > column.max() / 2.0)]


def test_a_log_axis_puts_each_value_where_its_logarithm_says(tmp_path):
    rows = log_rows(tmp_path)
    assert len(rows) == len(LOG_VALUES)  # one row each
    for row, value in zip(sorted(rows, reverse=True), LOG_VALUES):
        # definition of a logarithmic scale: the fraction of the height is
        # log(v / low) / log(high / low)
        expected = BOTTOM - math.log10(value / 1.0) / math.log10(1000.0) * (BOTTOM - TOP)
        assert abs(row + 0.5 - expected) <= LANDING_PX


def test_a_log_axis_spaces_the_decades_equally(tmp_path):
    low_row, middle_row, high_row = sorted(log_rows(tmp_path), reverse=True)
    # definition of a logarithmic scale: equal ratios (2 -> 20 -> 200) at equal distances
    assert abs((low_row - middle_row) - (middle_row - high_row)) <= LANDING_PX


# -- ticks --------------------------------------------------------------------------------

#: Random ranges from a fixed seed: offsets and spans over many decades, budgets as axes ask.
_RNG = np.random.default_rng(20240611)
TICK_CASES = [
    (float(centre - span / 2.0), float(centre + span / 2.0), int(most))
    for centre, span, most in zip(
        _RNG.uniform(-1.0, 1.0, 80) * 10.0 ** _RNG.uniform(-6.0, 6.0, 80),
        10.0 ** _RNG.uniform(-5.0, 5.0, 80),
        _RNG.integers(canvas.FEWEST_TICK_BUDGET, canvas.MOST_TICKS + 1, 80))]


def tick_step(ticks: np.ndarray) -> float:
    return float(np.median(np.diff(ticks)))


def float_slack(*values: float) -> float:
    """What rounding to doubles may move a tick near ``values`` by (a few ulps)."""
    return 4.0 * np.finfo(float).eps * max(abs(v) for v in values)


def ladder_step(step: float) -> float:
    """The value of the ladder (1, 2, 2.5, 5 times a power of ten) nearest ``step``."""
    power = 10.0 ** math.floor(math.log10(step))
    return min((m * power * scale for m in TICK_LADDER for scale in (1.0, 10.0)),
               key=lambda candidate: abs(candidate - step))


@pytest.mark.parametrize(("low", "high", "most"), TICK_CASES)
def test_ticks_cover_the_range_evenly_on_the_ladder_and_within_the_budget(low, high, most):
    ticks = nice_ticks(low, high, most)
    step = ladder_step(tick_step(ticks))
    slack = float_slack(low, high) + 1e-9 * step
    assert 2 <= ticks.size <= most
    # common practice (graph paper): steps of 1, 2, 2.5 or 5 times a power of ten,
    # ticks at whole multiples of the step, evenly spaced
    assert np.all(np.abs(np.diff(ticks) - step) <= 2.0 * slack)
    assert np.all(np.abs(ticks - np.round(ticks / step) * step) <= slack)
    # inside the range and reaching to within one step of both ends
    assert low - slack <= ticks[0] < low + step and high - step < ticks[-1] <= high + slack


@pytest.mark.parametrize(("low", "high", "most"), TICK_CASES[:20])
def test_the_tick_step_is_the_smallest_on_the_ladder_that_fits(low, high, most):
    step = ladder_step(tick_step(nice_ticks(low, high, most)))
    decade = math.floor(math.log10(step))
    ladder = sorted(m * 10.0 ** e for m in TICK_LADDER for e in range(decade - 2, decade + 1))
    smaller = max(s for s in ladder if s < step * (1 - 1e-9))
    fits = math.floor(high / smaller + 1e-9) - math.ceil(low / smaller - 1e-9) + 1
    assert fits > most


@pytest.mark.parametrize(("low", "high"), [(0.0, 1.05), (0.0, 5.25), (0.0, 37.8), (0.0, 2.2)])
def test_count_axes_get_whole_number_ticks(low, high):
    ticks = nice_ticks(low, high, canvas.FEWEST_TICK_BUDGET, integer=True)
    # common practice: builds are counted in whole numbers
    assert ticks.size >= 2 and np.array_equal(ticks, np.round(ticks))


@pytest.mark.parametrize(("low", "high", "most"), TICK_CASES)
def test_tick_labels_share_one_number_of_decimals_and_read_back_as_the_ticks(low, high, most):
    ticks = nice_ticks(low, high, most)
    labels = tick_labels(ticks)
    if "e" in "".join(labels):  # beyond MAX_TICK_DECIMALS: significant digits instead
        assert tick_step(ticks) < 10.0 ** -canvas.MAX_TICK_DECIMALS
        return
    decimals = {len(label.partition(".")[2]) for label in labels}
    # common practice: one number of decimals along an axis, exact for every tick
    assert len(decimals) == 1
    places = decimals.pop()
    assert np.allclose([float(label) for label in labels], ticks, rtol=0.0,
                       atol=0.5 * 10.0 ** -places)


@pytest.mark.parametrize(("ticks", "labels"), [
    ([0.0, 2.5, 5.0, 7.5], ["0.0", "2.5", "5.0", "7.5"]),
    ([-120.0, -100.0, -80.0], ["-120", "-100", "-80"]),
    ([0.1 * 3, 0.1 * 4], ["0.3", "0.4"]),
    ([-1e-17, 0.25, 0.5], ["0.00", "0.25", "0.50"]),
])
def test_tick_labels_are_written_as_people_write_axis_labels(ticks, labels):
    # common practice: the fewest decimals that write every tick, no "-0", no float noise
    assert tick_labels(ticks) == labels


@pytest.mark.parametrize(("low", "high"), [(1.0, 1e6), (3e-9, 2e-3), (20.0, 20000.0)])
def test_log_ticks_over_decades_are_one_two_and_five_times_powers_of_ten(low, high):
    ticks = log_ticks(low, high, canvas.MOST_TICKS)
    mantissas = ticks / 10.0 ** np.floor(np.log10(ticks) + 1e-9)
    # common practice: a log axis labels 1, 2 and 5 per decade, or the decades alone
    assert ticks.size >= 2
    assert np.all(np.isclose(mantissas[:, None], [1.0, 2.0, 5.0], rtol=1e-9).any(axis=1))
    assert np.all((ticks >= low * (1 - 1e-9)) & (ticks <= high * (1 + 1e-9)))


def test_given_ticks_and_a_formatter_are_used_and_ticks_outside_the_axis_dropped():
    axis = Scale(1.0, 10.0, ticks=[0.5, 2.0, 7.0, 12.0], format=lambda v: f"<{v:g}>")
    ticks = axis.tick_values(500.0, canvas.X_TICK_SPACING_PX)
    assert list(ticks) == [2.0, 7.0] and axis.tick_text(ticks) == ["<2>", "<7>"]


@pytest.mark.parametrize(("make", "message"), [
    (lambda: Scale(0.0, 10.0, log=True), "positive"),
    (lambda: Scale(5.0, 5.0), "rising"),
    (lambda: Pen(RED, 1.0, "dash-dot"), "Unknown dash"),
    (lambda: Marker(RED, "square"), "Unknown marker shape"),
])
def test_bad_axes_pens_and_markers_are_refused_with_the_bad_value(make, message):
    with pytest.raises(ValueError, match=message):
        make()


# -- dashes and clipping -------------------------------------------------------------------

ROW_VALUE = 0.5


def along_a_line(tmp_path, dash: str, width: float = 2.0) -> np.ndarray:
    """Redness along the row of a horizontal line drawn with ``dash``, inside the panel."""
    pixels = drawn(tmp_path, lambda sheet: sheet.panel(
        *BOX, x=Scale(0.0, 1.0), y=Scale(0.0, 1.0)).hline(ROW_VALUE, Pen(RED, width, dash)))
    rows = redness(pixels[TOP:BOTTOM, LEFT:RIGHT])
    return rows[np.argmax(rows.max(axis=1))]


def test_a_solid_line_has_no_gaps_along_its_length(tmp_path):
    assert np.all(along_a_line(tmp_path, "solid") > 255 - INK_LEVEL)


@pytest.mark.parametrize("dash", ["dashed", "dotted"])
def test_a_dashed_or_dotted_line_leaves_gaps_in_the_proportion_of_its_pattern(tmp_path, dash):
    row = along_a_line(tmp_path, dash)
    on, off = DASHES[dash]
    inked_share = np.mean(row > (255 - INK_LEVEL) / 2.0)
    gaps = np.count_nonzero(np.diff((row > (255 - INK_LEVEL) / 2.0).astype(int)) == -1)
    # the pattern's own proportion (on / (on + off)), within the antialiased ends of
    # each dash; and a gap every pattern length along the line
    assert inked_share == pytest.approx(on / (on + off), abs=0.15)
    assert gaps >= 0.8 * (RIGHT - LEFT) / ((on + off) * 2.0) - 1


def test_a_line_is_broken_where_a_value_is_missing(tmp_path):
    xs = np.linspace(0.0, 1.0, 101)
    ys = np.full(xs.shape, ROW_VALUE)
    ys[40:60] = np.nan
    pixels = drawn(tmp_path, lambda sheet: sheet.panel(
        *BOX, x=Scale(0.0, 1.0), y=Scale(0.0, 1.0)).line(xs, ys, Pen(RED, 2.0)))
    rows = redness(pixels[TOP:BOTTOM, LEFT:RIGHT])
    row = rows[np.argmax(rows.max(axis=1))]
    middle = (RIGHT - LEFT) // 2
    assert row[middle] < INK_LEVEL and row[10] > 255 - INK_LEVEL and row[-10] > 255 - INK_LEVEL


def test_clipping_keeps_lines_markers_spans_and_bars_inside_the_panel(tmp_path):
    def draw(sheet):
        panel = sheet.panel(*BOX, x=Scale(0.0, 1.0), y=Scale(0.0, 1.0))
        panel.line([-1.0, 2.0], [-1.0, 2.0], Pen(RED, 6.0))
        panel.line([0.5, 0.5, 1e12], [-1e12, 0.5, 0.5], Pen(RED, 4.0, "dashed"))
        panel.line(np.linspace(-0.5, 1.5, 400), np.sin(np.linspace(0.0, 40.0, 400)) * 2.0,
                   Pen(BLUE, 3.0))
        panel.markers([0.0, 1.0, 0.5, 0.999], [0.0, 1.0, 1.0, 0.5], Marker(RED, size=10.0))
        panel.markers([0.0, 1.0], [0.0, 0.5], Marker(BLUE, "x", size=10.0))
        panel.vspan(-3.0, 0.2, "#cccccc")
        panel.bars([0.8, 0.9, 1.3], [0.5, 3.0], BLUE, edge=Pen("white", 1.0))

    ink = inked(drawn(tmp_path, draw))
    outside = ink.copy()
    outside[TOP:BOTTOM, LEFT:RIGHT] = False
    assert ink[TOP:BOTTOM, LEFT:RIGHT].sum() > 1000  # the drawing is there...
    assert not outside.any()  # ...and none of it beyond the panel


def test_an_unclipped_marker_on_the_axis_line_shows_whole(tmp_path):
    def draw(sheet):
        sheet.panel(*BOX, x=Scale(0.0, 1.0), y=Scale(0.0, 1.0)).markers(
            [0.5], [0.0], Marker(RED, "x", size=10.0), clip=False)

    ink = inked(drawn(tmp_path, draw))
    assert ink[BOTTOM + 2:BOTTOM + 5, LEFT:RIGHT].any() and ink[BOTTOM - 5:BOTTOM, LEFT:RIGHT].any()


# -- text -----------------------------------------------------------------------------------


def ink_box(ink: np.ndarray) -> tuple[int, int, int, int]:
    """(left, top, right, bottom) of the inked pixels, right and bottom exclusive."""
    rows, columns = np.flatnonzero(ink.any(axis=1)), np.flatnonzero(ink.any(axis=0))
    return columns[0], rows[0], columns[-1] + 1, rows[-1] + 1


def test_the_title_is_written_at_the_top_left_and_nowhere_else(tmp_path):
    pixels = drawn(tmp_path, lambda sheet: plots.titles(sheet, "A title", "a grey subtitle"),
                   size=(plots.inches_px(plots.FIGURE_WIDTH_IN), 200))
    left, top, right, bottom = ink_box(inked(pixels))
    assert plots.TITLE_LEFT_PX - 2 <= left <= plots.TITLE_LEFT_PX + 3
    assert plots.TITLE_TOP_PX - 2 <= top <= plots.TITLE_TOP_PX + plots.TITLE_SIZE_PX / 2
    assert bottom <= plots.SUBTITLE_TOP_PX + 2 * plots.SUBTITLE_SIZE_PX and right < 400
    title = pixels[top:int(plots.SUBTITLE_TOP_PX) - 1, left:right]
    assert title.min() < 60  # black, not grey


def test_a_vertical_label_reads_upwards_in_a_tall_narrow_box(tmp_path):
    def draw(sheet):
        sheet.text(100, 150, "a long axis title", vertical=True)
        sheet.text(300, 150, "sideways", anchor="mm")

    ink = inked(drawn(tmp_path, draw))
    left, top, right, bottom = ink_box(ink[:, :200])
    assert bottom - top > 4 * (right - left) and abs((top + bottom) / 2 - 150) <= 2
    left, top, right, bottom = ink_box(ink[:, 200:])
    assert right - left > 2 * (bottom - top)


def test_characters_the_built_in_font_lacks_are_written_with_ascii_stand_ins(tmp_path):
    # source: Pillow's ImageFont.load_default documentation: the built-in Aileron Regular
    # has "a more limited character set" (no ohm or micro sign); parts lists write micro
    # as u in ASCII (common practice)
    symbols = drawn(tmp_path, lambda sheet: sheet.text(20, 20, "4.7 kΩ, 10 µF"), "a.png")
    ascii_ = drawn(tmp_path, lambda sheet: sheet.text(20, 20, "4.7 kohm, 10 uF"), "b.png")
    assert np.array_equal(symbols, ascii_)


def test_two_sheets_drawn_at_once_on_two_threads_match_sheets_drawn_alone(tmp_path):
    t = np.linspace(0.0, 0.01, 3000)
    traces = {"a": np.sin(2000.0 * t), "b": np.sign(np.sin(3000.0 * t))}

    def plot(name):
        plots.waveform_plot(tmp_path / name, t, traces, "threads: title", "subtitle text")

    plot("alone.png")
    threads = [threading.Thread(target=plot, args=(f"t{i}.png",)) for i in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    alone = (tmp_path / "alone.png").read_bytes()
    assert all((tmp_path / f"t{i}.png").read_bytes() == alone for i in range(2))


# -- writing in place -----------------------------------------------------------------------


def test_an_older_file_is_replaced_only_when_the_new_one_is_complete(tmp_path, monkeypatch):
    path = tmp_path / "plot.png"
    path.write_bytes(b"older")
    seen = {}
    real_replace = fileio.os.replace

    def replace(source, destination):
        seen["destination"] = path.read_bytes()
        seen["source"] = pathlib.Path(source).read_bytes()
        real_replace(source, destination)

    monkeypatch.setattr(fileio.os, "replace", replace)
    Sheet(50, 40).save(path, plots.PNG_COMPRESS_LEVEL)
    assert seen["destination"] == b"older"  # untouched until the rename
    assert seen["source"][:8] == b"\x89PNG\r\n\x1a\n" and path.read_bytes() == seen["source"]
    assert [p.name for p in tmp_path.iterdir()] == ["plot.png"]


def test_a_failed_write_keeps_the_older_file_and_no_temporary(tmp_path, monkeypatch):
    path = tmp_path / "plot.png"
    path.write_bytes(b"older")

    def fail(self, data):
        with open(self, "wb") as half:
            half.write(data[:10])
        raise OSError("disk full")

    monkeypatch.setattr(pathlib.Path, "write_bytes", fail)
    with pytest.raises(OSError, match="disk full"):
        Sheet(50, 40).save(path, plots.PNG_COMPRESS_LEVEL)
    assert path.read_bytes() == b"older" and [p.name for p in tmp_path.iterdir()] == ["plot.png"]


# -- the plots' point reduction -------------------------------------------------------------

ENVELOPE_POINTS = 20011  # not a multiple of the buckets
ENVELOPE_MAX = 1000


@pytest.mark.parametrize("spike_at", [0, 1, 5003, 12345, ENVELOPE_POINTS - 40])
def test_the_envelope_keeps_every_narrow_spike_up_and_down(spike_at):
    x = np.arange(ENVELOPE_POINTS, dtype=np.float64)
    y = np.sin(x / 300.0)
    y[spike_at], y[spike_at + 3] = 5.0, -5.0  # one sample each, within one bucket
    xs, ys = plots.envelope(x, y, ENVELOPE_MAX)
    assert xs.size <= ENVELOPE_MAX and np.all(np.diff(xs) > 0)  # fewer points, in time order
    assert np.array_equal(ys, y[xs.astype(int)])  # points of the record, not new ones
    assert 5.0 in ys and -5.0 in ys


def test_the_envelope_of_a_spectrum_keeps_each_buckets_peak():
    f = np.arange(ENVELOPE_POINTS, dtype=np.float64)
    level = -100.0 + np.zeros(f.size)
    peaks = [17, 4000, 4001, 15000]
    level[peaks] = [-3.0, -20.0, -21.0, -40.0]
    xs, ys = plots.envelope(f, level, ENVELOPE_MAX, keep="max")
    assert xs.size <= ENVELOPE_MAX
    assert {17.0, 15000.0} <= set(xs) and {-3.0, -40.0} <= set(ys) and -20.0 in ys


def test_a_short_record_is_drawn_as_it_is():
    x = np.arange(10.0)
    xs, ys = plots.envelope(x, x ** 2, ENVELOPE_MAX)
    assert np.array_equal(xs, x) and np.array_equal(ys, x ** 2)
