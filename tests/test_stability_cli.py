"""``ensemble stability`` end to end, its input reader, and the per-tau table behind it."""

from __future__ import annotations

import json
import math
import pathlib

import numpy as np
import pytest

from ensemble.cli import main
from ensemble.commands.stability import read_values
from ensemble.errors import InputError
from ensemble.stability import deviation_interval, edf_for, stability_table

AUTH = pathlib.Path(__file__).resolve().parent / "authorities"
SMALL = AUTH / "sp1065_small_frequency.txt"
CONTRACT_KEYS = {"tau", "deviation", "n", "edf", "lo", "hi"}


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def write(tmp_path, text, name="series.txt"):
    path = tmp_path / name
    path.write_text(text)
    return path


# --------------------------------------------------------------------------------------------
# Successful runs


def test_json_output_on_the_handbook_set(capsys):
    code, out, err = run(capsys, "stability", SMALL, "--statistic", "oadev", "--tau0", "1",
                         "--input", "frequency", "--taus", "1,2", "--json")
    assert code == 0 and err == ""
    rows = json.loads(out)
    assert [r["tau"] for r in rows] == [1.0, 2.0]
    for r in rows:
        assert CONTRACT_KEYS <= set(r) and set(r) <= CONTRACT_KEYS | {"alpha", "noise"}
        assert r["lo"] < r["deviation"] < r["hi"] and r["edf"] > 0
    # Cross-check: SP 1065 (2008) small set OADEV 91.22945, 85.95287; recalled, not read in the
    # source, every digit reproduced by our own computation
    assert rows[0]["deviation"] == pytest.approx(91.22945, rel=1e-6)
    assert rows[1]["deviation"] == pytest.approx(85.95287, rel=1e-6)
    assert [r["n"] for r in rows] == [8, 6]


def test_json_equals_the_library_table(capsys, tmp_path):
    rng = np.random.default_rng(81)
    x = np.cumsum(rng.standard_normal(700)) * 1e-9
    path = write(tmp_path, "\n".join(repr(float(v)) for v in x) + "\n")
    for stat in ("adev", "mdev", "tdev", "hdev", "ohdev", "totdev"):
        code, out, _ = run(capsys, "stability", path, "--statistic", stat, "--tau0", "30",
                           "--input", "phase", "--taus", "decade", "--json")
        assert code == 0
        expected = [r.as_dict() for r in stability_table(x, 30.0, stat, taus="decade")]
        assert json.loads(out) == expected


def test_text_table(capsys):
    code, out, _ = run(capsys, "stability", SMALL, "--statistic", "totdev", "--tau0", "1",
                       "--input", "frequency")
    assert code == 0
    assert "total deviation" in out and "9 frequency values" in out
    body = [line for line in out.splitlines() if line[:12].strip().replace(".", "").isdigit()]
    assert len(body) == 3 and body[1].split()[1] == "9.39038e+01"


def test_plot_is_written_atomically(capsys, tmp_path):
    png = tmp_path / "oadev.png"
    code, out, _ = run(capsys, "stability", SMALL, "--statistic", "oadev", "--tau0", "1",
                       "--input", "frequency", "--plot", png)
    assert code == 0 and out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["oadev.png"]
    code, _, err = run(capsys, "stability", SMALL, "--statistic", "oadev", "--tau0", "1",
                       "--input", "frequency", "--plot", tmp_path / "missing" / "p.png")
    assert code == 2 and len(err.strip().splitlines()) == 1 and "does not exist" in err


def test_confidence_option(capsys):
    base = json.loads(run(capsys, "stability", SMALL, "--statistic", "mdev", "--tau0", "1",
                          "--input", "frequency", "--json")[1])
    wide = json.loads(run(capsys, "stability", SMALL, "--statistic", "mdev", "--tau0", "1",
                          "--input", "frequency", "--json", "--confidence", "0.95")[1])
    for a, b in zip(base, wide):
        assert b["lo"] < a["lo"] and b["hi"] > a["hi"] and a["edf"] == b["edf"]


def test_help_lists_the_command(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--help"])
    assert exc.value.code == 0 and "stability" in capsys.readouterr().out
    with pytest.raises(SystemExit) as exc:
        main(["stability", "--help"])
    assert exc.value.code == 0 and "--taus" in capsys.readouterr().out


# --------------------------------------------------------------------------------------------
# Bad input: exit 2, one line


@pytest.mark.parametrize("content,args,pattern", [
    ("1\n2\nabc\n4\n", (), r"series\.txt:3: 'abc' is not a number"),
    ("value\n1\n2\nx1\n", (), r"series\.txt:4: column 'value': 'x1' is not a number"),
    ("1\n2,5\n3\n", (), r"series\.txt:2: found 2 fields .*decimal comma"),
    ("1\n2\n3,4,5\n", (), r"series\.txt:3: found 3 fields"),
    ("1\ninf\n3\n", (), r"series\.txt:2: 'inf' is infinite"),
    ("", (), r"series\.txt: no values found"),
    ("# only a comment\n\n", (), r"no values found"),
    ("1\n", (), r"too few values for oadev: the record has 1 frequency value; it needs at "
              r"least 2 frequency values"),
    ("1\n2\n3\n4\n5\n", ("--taus", "3"), r"3 s \(m = 3\) needs at least 6 frequency values"),
    ("1\n2\n3\n4\n5\n6\n7\n", ("--taus", "1,1.5"), r"1\.5 s is not a multiple of tau0"),
    ("1\n2\n3\n4\n5\n6\n7\n", ("--taus", "1,,2"), r"empty item"),
    ("1\n2\n3\n4\n5\n6\n7\n", ("--taus", "1,ten"), r"'ten' is not a number of seconds"),
    ("1\n\n3\n\n5\n\n7\n", ("--taus", "1"), r"every oadev term touches a missing value"),
])
def test_bad_input_exit_2_one_line(capsys, tmp_path, content, args, pattern):
    path = write(tmp_path, content)
    code, out, err = run(capsys, "stability", path, "--statistic", "oadev", "--tau0", "1",
                         "--input", "frequency", *args)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1
    assert pytest.importorskip("re").search(pattern, err), err


@pytest.mark.parametrize("tau0,pattern", [("0", "tau0 must be a finite number"),
                                          ("-5", "tau0 must be a finite number"),
                                          ("nan", "tau0 must be a finite number"),
                                          ("abc", "--tau0 'abc' is not a number")])
def test_bad_tau0(capsys, tau0, pattern):
    code, out, err = run(capsys, "stability", SMALL, "--statistic", "oadev", "--tau0", tau0,
                         "--input", "frequency")
    assert code == 2 and out == "" and pattern in err and len(err.strip().splitlines()) == 1


def test_missing_file(capsys, tmp_path):
    code, _, err = run(capsys, "stability", tmp_path / "nope.txt", "--statistic", "oadev",
                       "--tau0", "1", "--input", "phase")
    assert code == 2 and "nope.txt: file not found" in err


def test_bad_confidence(capsys):
    code, _, err = run(capsys, "stability", SMALL, "--statistic", "oadev", "--tau0", "1",
                       "--input", "frequency", "--confidence", "68")
    assert code == 2 and "confidence must be between 0 and 1" in err


# --------------------------------------------------------------------------------------------
# The reader


def test_reader_header_comments_gaps_and_ends(tmp_path):
    text = ("\ufeff# a comment\n\n  phase_s \n# another\n\n1.5e-9\n\n nan \n2.5E-9\r\n"
            "\"3e-9\"\n\n\n")
    values, rows = read_values(str(write(tmp_path, text)))
    assert rows == [6, 7, 8, 9, 10]
    np.testing.assert_array_equal(np.isnan(values), [False, True, True, False, False])
    assert values[0] == 1.5e-9 and values[3] == 2.5e-9 and values[4] == 3e-9


def test_reader_header_only_on_the_first_line(tmp_path):
    with pytest.raises(InputError, match=":3: 'phase' is not a number"):
        read_values(str(write(tmp_path, "1\n2\nphase\n")))


def test_blank_line_is_a_gap_in_the_cli(capsys, tmp_path):
    rng = np.random.default_rng(82)
    y = rng.standard_normal(64)
    lines = [repr(float(v)) for v in y]
    lines[20] = ""
    path = write(tmp_path, "\n".join(lines) + "\n")
    rows = json.loads(run(capsys, "stability", path, "--statistic", "oadev", "--tau0", "1",
                          "--input", "frequency", "--taus", "1", "--json")[1])
    # Cross-check: frequency gap at sample 20 removes the m = 1 terms whose span [i, i+1]
    # contains it (i = 19, 20): 63 - 2 terms
    assert rows[0]["n"] == 61


# --------------------------------------------------------------------------------------------
# The table


def test_table_rows_combine_the_pieces():
    rng = np.random.default_rng(83)
    x = np.cumsum(rng.standard_normal(3000)) * 1e-10
    rows = stability_table(x, 1.0, "ohdev", confidence=0.9)
    assert [r.m for r in rows] == [1, 2, 4, 8, 16, 32, 64, 128, 256, 512]
    for r in rows:
        edf = edf_for("ohdev", r.alpha, r.m, r.n, 3000)
        lo, hi = deviation_interval(r.deviation, edf, 0.9)
        assert r.edf == edf and r.lo == float(lo) and r.hi == float(hi)
        assert r.noise_code in ("WPM", "FPM", "WFM", "FFM", "RWFM", "FWFM", "RRFM")
    assert rows[0].noise == "white FM" and rows[0].noise_method == "lag1"


def test_table_omits_factors_without_terms():
    y = 1.0 + np.random.default_rng(84).standard_normal(40) * 0.1
    y[2::2] = np.nan                      # every other frequency sample missing after y_1
    rows = stability_table(y, 1.0, "oadev", data="frequency")
    # only the pair (y_0, y_1) is gap-free: one term at m = 1, none for m >= 2 (omitted)
    assert [(r.m, r.n) for r in rows] == [(1, 1)]
    with pytest.raises(InputError, match="every oadev term touches a missing value"):
        stability_table(y, 1.0, "oadev", data="frequency", taus=[1, 2])


def test_table_noise_methods_on_short_records():
    y = np.random.default_rng(85).standard_normal(200)
    rows = stability_table(y, 1.0, "oadev", data="frequency")
    methods = [r.noise_method for r in rows]
    assert methods[0] == "lag1" and methods[-1] == "carried"
    # the carried alpha is the last one identified at a shorter tau
    last = max(k for k, r in enumerate(rows) if r.noise_method != "carried")
    assert all(r.alpha == rows[last].alpha for r in rows[last + 1:])
    tiny = stability_table([1.0, 3.0, 2.0], 1.0, "oadev", data="frequency")
    assert [(r.m, r.noise_method, r.noise) for r in tiny] == [(1, "default", "white FM")]


def test_table_explicit_taus_sorted_and_unique():
    rows = stability_table(np.arange(50.0) ** 1.5, 2.0, "mdev", taus=[8, 2, 8.0, 4])
    assert [r.tau_s for r in rows] == [2.0, 4.0, 8.0]
    assert all(math.isfinite(r.edf) for r in rows)


def test_table_errors():
    with pytest.raises(InputError, match="unknown statistic"):
        stability_table([1.0, 2.0, 3.0], 1.0, "xdev")
    with pytest.raises(InputError, match="not a multiple"):
        stability_table(np.arange(20.0), 1.0, "oadev", taus=[2.5])
    with pytest.raises(InputError, match="needs at least 18 phase values"):
        stability_table(np.arange(10.0), 1.0, "mdev", taus=[6])


def test_given_noise_type(capsys):
    code, out, _ = run(capsys, "stability", SMALL, "--statistic", "ohdev", "--tau0", "1",
                       "--input", "frequency", "--noise", "rrfm", "--json")
    rows = json.loads(out)
    assert code == 0 and {(r["alpha"], r["noise"]) for r in rows} == {(-4, "random-run FM")}
    y, _ = read_values(str(SMALL))
    expected = stability_table(y, 1.0, "ohdev", data="frequency", alpha=-4)
    assert rows == [r.as_dict() for r in expected]
    assert {r.noise_method for r in expected} == {"given"}
    code, _, err = run(capsys, "stability", SMALL, "--statistic", "oadev", "--tau0", "1",
                       "--input", "frequency", "--noise", "RRFM")
    assert code == 2 and "from -2 to 2 for oadev" in err
    with pytest.raises(InputError, match="integer from -2 to 2"):
        stability_table(y, 1.0, "mdev", data="frequency", alpha=0.5)
