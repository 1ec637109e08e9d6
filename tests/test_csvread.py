"""Measurement CSV readers: accepted forms, validation messages, and order independence."""

from __future__ import annotations

import hashlib
import io

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ensemble.errors import InputError
from ensemble.io.csvread import parse_measurements, read_measurements
from ensemble.io.summary import grid_slots, summarize

from conftest import DATA_DIR

HEADER = "mjd,clock,reference,phase\n"
HOUR_D = 1 / 24


def long_text(n_epochs: int = 4, clocks=("A", "B"), ref="R", start=60676.0) -> str:
    """Hourly long-form rows, six-decimal MJD; phase = (clock number) ns + epoch * 0.1 ns."""
    lines = [HEADER]
    for k in range(n_epochs):
        for i, c in enumerate(clocks):
            lines.append(f"{start + k * HOUR_D:.6f},{c},{ref},{(i + 1) * 1e-9 + k * 1e-10:.6e}\n")
    return "".join(lines)


def parse(text, reference=None):
    return parse_measurements(text, "m.csv", reference=reference)


# --------------------------------------------------------------------------- happy paths
def test_long_form_mjd():
    m = parse(long_text())
    assert m.clocks == ("A", "B", "R")                       # sorted; the reference is a clock
    assert m.n_epochs == 4 and m.tau0_s == 3600.0
    assert m.elapsed_s.tolist() == [0.0, 3600.0, 7200.0, 10800.0]
    assert m.reference.tolist() == [2, 2, 2, 2]
    assert m.phase_s[:, 2].tolist() == [0.0] * 4             # the reference's own column
    # Cross-check: values as written in the text
    assert m.phase_s[1, 0] == 1.1e-9 and m.phase_s[3, 1] == 2.3e-9
    assert m.mjd[1] == 60676.041667 and m.source == "m.csv"


def test_long_form_iso_and_columns_in_any_order():
    text = ("phase,reference,Time,clock\n"
            "1e-9,R,2026-03-01T12:00:00Z,A\n2e-9,R,2026-03-01T12:00:00+00:00,B\n"
            "1.5e-9,R,2026-03-01T12:05:00Z,A\n2.5e-9,R,2026-03-01T12:05:00Z,B\n")
    m = parse(text)
    assert m.n_epochs == 2 and m.tau0_s == 300.0
    # Cross-check: 2026-03-01 is MJD 61100 (Python datetime: 2026-03-01 - 1858-11-17)
    assert m.mjd[0] == 61100.5
    assert m.phase_s.tolist() == [[1e-9, 2e-9, 0.0], [1.5e-9, 2.5e-9, 0.0]]


def test_wide_form_mjd_and_iso():
    text = "mjd,A,B\n60676.000000,1e-9,2e-9\n60676.041667,1.1e-9,\n60676.083333,,2.2e-9\n"
    m = parse(text, reference="R")
    assert m.clocks == ("A", "B", "R")                       # header order, reference appended
    assert np.isnan(m.phase_s[1, 1]) and np.isnan(m.phase_s[2, 0])
    assert m.reference.tolist() == [2, 2, 2]
    text = "time,A,R\n2026-03-01T12:00:00Z,1e-9,0\n2026-03-01T12:00:01Z,1.1e-9,\n"
    m = parse(text, reference="R")
    assert m.clocks == ("A", "R") and m.tau0_s == 1.0
    assert m.phase_s[:, 1].tolist() == [0.0, 0.0]


def test_unsorted_rows_give_the_sorted_result():
    text = long_text(5)
    lines = text.splitlines(keepends=True)
    shuffled = lines[:1] + [lines[i] for i in np.random.default_rng(3).permutation(
        np.arange(1, len(lines)))]
    a, b = parse(text), parse("".join(shuffled))
    assert a.clocks == b.clocks
    for field in ("mjd", "elapsed_s", "phase_s", "reference"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field))
    wide = "mjd,A,B\n60676.083333,3,4\n60676.000000,1,2\n60676.041667,5,6\n"
    m = parse(wide.replace(",3,4", ",3e-9,4e-9").replace(",1,2", ",1e-9,2e-9")
              .replace(",5,6", ",5e-9,6e-9"), reference="R")
    assert m.phase_s[:, 0].tolist() == [1e-9, 5e-9, 3e-9]


def test_gaps_missing_epochs_and_cells():
    text = HEADER + "".join(
        f"{60676 + k * HOUR_D:.6f},{c},R,{'' if (k, c) == (3, 'B') else '1e-9'}\n"
        for k in (0, 1, 3, 4, 7) for c in ("A", "B"))
    m = parse(text)
    assert m.elapsed_s.tolist() == [0.0, 3600.0, 10800.0, 14400.0, 25200.0]
    assert np.isnan(m.phase_s[2, 1]) and np.isfinite(m.phase_s).sum() == 9 + 5
    assert grid_slots(m) == 8
    assert "3 of 8 grid slots missing" in summarize(m)


def test_reference_change_between_epochs():
    text = (HEADER + "60676.0,A,R,1e-9\n60676.0,B,R,2e-9\n"
            "60676.041667,A,B,-1e-9\n60676.041667,R,B,-2e-9\n")
    m = parse(text)
    assert m.clocks == ("A", "B", "R")
    assert m.reference.tolist() == [2, 1]
    assert m.phase_s.tolist() == [[1e-9, 2e-9, 0.0], [-1e-9, 0.0, -2e-9]]
    assert "1 change" in summarize(m)


def test_leap_second_hourly_interval_is_3601_s():
    tags = ["2016-12-31T22:00:00Z", "2016-12-31T23:00:00Z", "2017-01-01T00:00:00Z",
            "2017-01-01T01:00:00Z"]
    text = "time,clock,reference,phase\n" + "".join(f"{t},A,R,1e-9\n{t},B,R,2e-9\n" for t in tags)
    m = parse(text)
    # Cross-check: TAI - UTC 36 -> 37 s at MJD 57754 (from memory, consistent with the table sum)
    assert np.diff(m.elapsed_s).tolist() == [3600.0, 3601.0, 3600.0]
    assert grid_slots(m) == 4
    mjd_text = HEADER + "".join(f"{v},A,R,1e-9\n{v},B,R,2e-9\n" for v in
                                ("57753.916667", "57753.958333", "57754.000000", "57754.041667"))
    assert np.diff(parse(mjd_text).elapsed_s).tolist() == [3600.0, 3601.0, 3600.0]
    # MJD labels are the values read, also in the last seconds of a day with a leap second
    one_s = HEADER + "".join(f"{57753 + (86397 + k) / 86400:.6f},{c},R,1e-9\n"
                             for k in range(6) for c in "AB")
    m = parse(one_s)
    assert m.mjd.tolist() == [float(f"{57753 + (86397 + k) / 86400:.6f}") for k in range(6)]


def test_leap_second_tag_23_59_60_accepted():
    tags = ["2016-12-31T23:59:59Z", "2016-12-31T23:59:60Z", "2017-01-01T00:00:00Z"]
    text = "time,A,B\n" + "".join(f"{t},1e-9,0\n" for t in tags)
    m = parse(text, reference="B")
    assert m.elapsed_s.tolist() == [0.0, 1.0, 2.0]
    assert np.all(np.diff(m.mjd) > 0) and grid_slots(m) == 3


def test_bom_crlf_blanks_spaces_quotes_and_case():
    text = long_text(3)
    variants = [
        "\ufeff" + text,
        text.replace("\n", "\r\n"),
        text.replace("\n", "\r"),
        text.replace(",", " , ").replace("mjd ", "MJD "),
        text + "\n\n   \n",
        text.replace("\n6", "\n\n6", 1),
        text.replace(",A,", ',"A",'),
    ]
    ref = parse(text)
    for v in variants:
        m = parse(v)
        assert m.clocks == ref.clocks
        np.testing.assert_array_equal(m.phase_s, ref.phase_s)
        np.testing.assert_array_equal(m.elapsed_s, ref.elapsed_s)


def test_indented_rows_and_blank_lines_of_spaces():
    # more than 1000 indented lines take the byte-counting route of the blank-line check
    rows = long_text(600).splitlines(keepends=True)
    text = rows[0] + "".join("  " + r for r in rows[1:700]) + "   \n\t\n" + "".join(rows[700:])
    m = parse(text)
    assert m.n_epochs == 600 and np.isfinite(m.phase_s).all()
    with pytest.raises(InputError) as exc:
        parse(text.replace("  60676.000000,B", "  60676.000000,B?", 1))
    assert exc.value.row == 3
    small = rows[0] + "  " + rows[1] + " \t \n" + "".join(rows[2:9])
    assert parse(small).n_epochs == 4
    with pytest.raises(InputError) as exc:
        parse(small.replace(rows[5], rows[5].replace("e-09", "x")))
    assert exc.value.row == 7                     # header, indented row, blank line, rows 2-4


def test_blank_lines_keep_line_numbers():
    text = HEADER + "60676.0,A,R,1e-9\n\n\n60676.0,B,R,xyz\n"
    with pytest.raises(InputError) as exc:
        parse(text)
    assert exc.value.row == 5 and exc.value.column == "phase"


def test_text_bytes_and_file_objects_agree(tmp_path):
    text = long_text(3)
    path = tmp_path / "m.csv"
    path.write_bytes(text.encode())
    from_file = read_measurements(path)
    # Cross-check: hashlib SHA-256 of the file's bytes
    assert from_file.sha256 == hashlib.sha256(text.encode()).hexdigest()
    assert from_file.source == str(path)
    for obj in (text, text.encode(), io.StringIO(text), io.BytesIO(text.encode())):
        m = parse_measurements(obj, "x")
        np.testing.assert_array_equal(m.phase_s, from_file.phase_s)
        assert m.sha256 == from_file.sha256


def test_reference_given_for_a_long_file_must_match():
    m = parse(long_text(), reference="R")
    assert m.clocks[m.reference[0]] == "R"


def test_the_demo_examples_read():
    m = read_measurements(DATA_DIR / "example_long.csv")
    assert m.clocks == ("CS1", "HM1", "HM2", "RB1") and m.n_epochs == 23
    assert m.reference[0] == 1 and m.reference[-1] == 2
    w = read_measurements(DATA_DIR / "example_wide.csv", reference="HM1")
    assert w.clocks[-1] == "HM1" and w.tau0_s == 600.0


# --------------------------------------------------------------------------- bad input
GOOD = long_text(3)
BAD = [
    # name, content, reference, regex, row, column
    ("empty file", "", None, "file is empty", None, None),
    ("blank file", "\n  \n", None, "file is empty", None, None),
    ("header only", HEADER, None, "header only", 1, None),
    ("missing column", "mjd,clock,phase\n60676,A,1e-9\n", None, "missing column 'reference'",
     1, None),
    ("unknown column", "mjd,clock,reference,phase,note\n60676,A,R,1e-9,x\n", None,
     "unknown column", 1, "note"),
    ("duplicated column", "mjd,clock,reference,phase,phase\n1,2,3,4,5\n", None,
     "appears twice", 1, "phase"),
    ("unnamed column", "mjd,clock,reference,phase,\n1,2,3,4,\n", None, "has no name", 1, None),
    ("both epoch columns", "mjd,time,clock,reference,phase\n1,2,3,4,5\n", None,
     "both 'mjd' and 'time'", 1, None),
    ("too many fields", GOOD + "60676.125000,A,R,1,5e-9\n", None, "5 fields, expected 4", 8, None),
    ("too few fields", GOOD + "60676.125000,A\n", None, "2 fields, expected 4", 8, None),
    ("number", GOOD.replace("1.100000e-09", "1.1ns"), None, "'1.1ns' is not a number", 4,
     "phase"),
    ("nan text", GOOD.replace("1.100000e-09", "NaN"), None, "not a finite number", 4, "phase"),
    ("inf text", GOOD.replace("1.100000e-09", "-inf"), None, "not a finite number", 4, "phase"),
    ("overflow", GOOD.replace("1.100000e-09", "1e999"), None, "not a finite number", 4, "phase"),
    ("unit error", GOOD.replace("1.100000e-09", "1.1"), None, "almost surely a unit error", 4,
     "phase"),
    ("mjd text", GOOD.replace("60676.041667,A", "60676,041667,A"), None, "5 fields", 4, None),
    ("mjd word", GOOD.replace("60676.041667,A", "today,A"), None, "'today' is not a decimal MJD",
     4, "mjd"),
    ("mjd range", GOOD.replace("60676.041667,A", "6067.041667,A"), None,
     "outside the supported range", 4, "mjd"),
    ("naive time", "time,clock,reference,phase\n2026-03-01T12:00:00,A,R,1e-9\n", None,
     r"no time zone.*2026-03-01T12:00:00Z or 2026-03-01T12:00:00\+00:00", 2, "time"),
    ("local offset", "time,clock,reference,phase\n2026-03-01T13:00:00+01:00,A,R,1e-9\n", None,
     "not UTC", 2, "time"),
    ("duplicate row", GOOD + "60676.041667,A,R,1e-9\n", None,
     r"clock 'A' at epoch '60676.041667' appears twice \(rows 4 and 8\)", 8, "clock"),
    ("two references", GOOD + "60676.125000,A,R,1e-9\n60676.125000,B,A,1e-9\n", None,
     r"reference 'A' differs from 'R' named at the same epoch in row 8", 9, "reference"),
    ("self with phase", GOOD + "60676.125000,R,R,1e-12\n", None, "measured against itself", 8,
     "phase"),
    ("irregular", GOOD + "60676.1,A,R,1e-9\n", None, r"lies \+1440 s from the 3600 s", 8, "mjd"),
    ("same slot", GOOD + "60676.041668,B,R,1e-9\n", None,
     r"'60676.041668' and '60676.041667' \(row 4\) fall on the same slot", 8, "mjd"),
    ("one clock", HEADER + "60676.0,A,A,0\n60676.041667,A,A,0\n", None,
     "only one clock", None, "clock"),
    ("one epoch", HEADER + "60676.0,A,R,1e-9\n", None, "only one epoch", 2, "mjd"),
    ("identifier space", GOOD.replace(",B,", ",B 2,", 1), None, "'B 2' is not a clock identifier",
     3, "clock"),
    ("identifier long", GOOD.replace(",B,", "," + "B" * 33 + ",", 1), None,
     "not a clock identifier", 3, "clock"),
    ("identifier accent", GOOD.replace(",B,", ",Bé,", 1), None, "not a clock identifier", 3,
     "clock"),
    ("empty clock", GOOD.replace(",B,", ",,", 1), None, "empty; expected a clock", 3, "clock"),
    ("empty reference", GOOD.replace(",R,", ",,", 1), None, "empty; expected a reference", 2,
     "reference"),
    ("bad reference name", GOOD.replace(",R,", ",R/1,", 1), None, "not a clock identifier", 2,
     "reference"),
    ("reference mismatch", GOOD, "Q", "differs from --reference Q", 2, "reference"),
    ("wide needs reference", "mjd,A,B\n60676,1e-9,2e-9\n", None, "--reference NAME", None, None),
    ("wide first column", "clockA,clockB\n1,2\n", None, "expected 'mjd' or 'time' first", 1,
     "clockA"),
    ("wide bad clock", "mjd,A,B C\n60676,1,2\n", "A", "not a clock identifier", 1, "B C"),
    ("wide reference column", "mjd,A,B\n60676.0,1e-9,0\n60676.041667,1e-9,3e-9\n", "B",
     "reference's own column must be empty or 0", 3, "B"),
    ("wide one clock", "mjd,A\n60676.0,0\n60676.041667,0\n", "A", "only one clock", 1, None),
    ("wide duplicate epoch", "mjd,A\n60676.0,1e-9\n60676.0,2e-9\n", "R",
     r"appears twice \(rows 2 and 3\)", 3, "mjd"),
    ("too coarse mjd", HEADER + "".join(f"{60676 + k / 86400:.5f},A,R,1e-9\n" for k in range(9)),
     None, "at least 6 decimals", None, "mjd"),
    ("unbalanced quote", GOOD.replace(",A,R,", ',"A,R,', 1), None, "unbalanced double quote", 2,
     None),
    ("utf-16", GOOD.encode("utf-16"), None, "not UTF-8 text: .*UTF-16", 1, None),
    ("utf-16 no bom", GOOD.encode("utf-16-le"), None, "looks like UTF-16", 1, None),
    ("latin-1", GOOD.replace(",B,", ",Bé,", 1).encode("latin-1"), None,
     "byte 0xe9 cannot be decoded", 3, "clock"),
    ("binary junk", bytes(np.random.default_rng(5).integers(0, 256, 300, dtype=np.uint8)), None,
     "not UTF-8 text", None, None),
    ("control byte", GOOD.replace("1.100000e-09", "1.1\x07e-09").encode(), None,
     "control byte 0x07", 4, "phase"),
    ("gzip", b"\x1f\x8b\x08\x00" + b"x" * 20, None, "gzip", 1, None),
]


@pytest.mark.parametrize("name, content, reference, regex, row, column", BAD,
                         ids=[b[0] for b in BAD])
def test_bad_input_names_row_and_column(name, content, reference, regex, row, column):
    with pytest.raises(InputError, match=regex) as exc:
        parse(content, reference=reference)
    err = exc.value
    assert err.path == "m.csv"
    message = str(err)
    assert "\n" not in message
    if row is not None:
        assert err.row == row
        assert message.startswith(f"m.csv:{row}: ")
    if column is not None:
        assert err.column == column
        assert f"column '{column}': " in message


def test_first_failing_row_is_reported():
    # a bad phase on line 7 and a bad clock identifier on line 4: line 4 is named
    text = long_text(3).splitlines(keepends=True)
    text[5] = text[5].replace("e-09", "e-09x")
    text[3] = text[3].replace(",A,", ",A?,")
    with pytest.raises(InputError) as exc:
        parse("".join(text))
    assert exc.value.row == 4 and exc.value.column == "clock"
    # in a wide row, the leftmost bad cell of the earliest bad line
    wide = "mjd,A,B,C\n60676.0,1e-9,2e-9,3e-9\n60676.041667,1e-9,x,y\n60676.083333,z,2e-9,3e-9\n"
    with pytest.raises(InputError) as exc:
        parse(wide, reference="R")
    assert (exc.value.row, exc.value.column) == (3, "B")


def test_messages_show_long_values_shortened():
    with pytest.raises(InputError) as exc:
        parse(GOOD.replace(",B,", "," + "Z" * 300 + ",", 1))
    assert len(str(exc.value)) < 200


# --------------------------------------------------------------------------- order independence
@st.composite
def long_form_data(draw):
    n_clocks = draw(st.integers(2, 5))
    clocks = [f"C{i}" for i in range(n_clocks)]
    n_slots = draw(st.integers(2, 30))
    # random gaps, at most half of the slots (a sparser grid would be refused as irregular)
    missing = draw(st.sets(st.integers(2, max(2, n_slots - 1)), max_size=(n_slots - 2) // 2))
    present = [k for k in range(n_slots) if k not in missing]
    iso = draw(st.booleans())
    tau0 = draw(st.sampled_from([1.0, 60.0, 3600.0]))
    rows = []
    for k in present:
        ref = draw(st.sampled_from(clocks))
        sod = 43200.0 + k * tau0
        if iso:
            h, rem = divmod(int(sod), 3600)
            day, h = divmod(h, 24)
            tag = f"2025-01-{day + 1:02d}T{h:02d}:{rem // 60:02d}:{rem % 60:02d}Z"
        else:
            tag = f"{60676 + sod / 86400:.9f}"
        for c in clocks:
            if k > 0 and c != ref and draw(st.integers(0, 4)) == 0:
                continue                                   # a single missing cell
            value = 0.0 if c == ref else draw(st.floats(-1e-6, 1e-6, allow_nan=False))
            empty = c != ref and draw(st.integers(0, 9)) == 0
            rows.append(f"{tag},{c},{ref},{'' if empty else repr(value)}\n")
    order = draw(st.permutations(range(len(rows))))
    header = "time,clock,reference,phase\n" if iso else HEADER
    return header, rows, order


@settings(max_examples=60, deadline=None)
@given(long_form_data())
def test_row_order_does_not_matter(data):
    header, rows, order = data
    a = parse(header + "".join(rows))
    b = parse(header + "".join(rows[i] for i in order))
    assert a.clocks == b.clocks and a.tau0_s == b.tau0_s
    for field in ("mjd", "elapsed_s", "phase_s", "reference"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field))
    # invariants of the container
    assert np.all(np.diff(a.mjd) > 0) and np.all(np.diff(a.elapsed_s) > 0)
    assert np.all(a.phase_s[np.arange(a.n_epochs), a.reference] == 0.0)
    np.testing.assert_array_equal(a.elapsed_s % a.tau0_s, 0.0)


# --------------------------------------------------------------------------- warnings
def test_warnings_are_logged_only_for_good_files(caplog):
    gappy = HEADER + "".join(f"{60676 + k * HOUR_D:.6f},{c},R,1e-9\n"
                             for k in (0, 1, 3, 5, 7, 9) for c in "AB")
    with caplog.at_level("WARNING", logger="ensemble"):
        m = parse(gappy)
    assert m.tau0_s == 3600.0
    assert [r.getMessage() for r in caplog.records] == [
        "m.csv: warning: the most common spacing of the epochs fits no grid; the smallest one, "
        "3600 s, is taken as the sampling interval"]
    caplog.clear()
    with caplog.at_level("WARNING", logger="ensemble"), pytest.raises(InputError):
        parse(gappy + "60676.375000,A,R,1e-9\n")              # a duplicate: no warning
    assert caplog.records == []


def test_tags_beyond_the_leap_table_are_read_with_a_warning(caplog):
    with caplog.at_level("WARNING", logger="ensemble"):
        m = parse(long_text(3, start=61300.0))                # 2026-09-17
    assert m.n_epochs == 3
    assert len(caplog.records) == 1
    message = caplog.records[0].getMessage()
    assert "beyond the leap-second table (valid before 2026-07-01)" in message


def test_a_long_gap_is_a_logged_warning(caplog):
    text = long_text(3) + "60776.000000,A,R,1e-9\n"            # 100 days later
    with caplog.at_level("WARNING", logger="ensemble"):
        m = parse(text)
    assert m.elapsed_s[-1] == 100 * 86400.0
    assert [r.getMessage() for r in caplog.records] == [
        "m.csv: warning: no epochs for 99.92 days between 2025-01-01T02:00:00Z and "
        "2025-04-11T00:00:00Z; check the tags"]


def test_mutated_files_fail_only_with_input_errors():
    # seeded byte mutations of the examples: every outcome is a result or one InputError line
    rng = np.random.default_rng(20261201)
    sources = [((DATA_DIR / "example_long.csv").read_bytes(), None),
               ((DATA_DIR / "example_wide.csv").read_bytes(), "HM1")]
    alphabet = b"0123456789.,-+eE \n\r\t\"aHMRZT:\xc3\xa9\x00"
    for trial in range(300):
        content, reference = sources[trial % 2]
        b = bytearray(content)
        for _ in range(int(rng.integers(1, 6))):
            pos = int(rng.integers(0, len(b)))
            op = rng.integers(0, 3)
            if op == 0:
                b[pos] = alphabet[rng.integers(0, len(alphabet))]
            elif op == 1:
                del b[pos:pos + int(rng.integers(1, 20))]
            else:
                b[pos:pos] = bytes(alphabet[rng.integers(0, len(alphabet))] for _ in range(3))
        try:
            parse(bytes(b), reference=reference)
        except InputError as exc:
            assert len(str(exc).splitlines()) == 1
