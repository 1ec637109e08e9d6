"""Bad archives give one-line InputErrors; the verifier finds each broken rule; ``inspect`` works.

Each damaged file is made from a conformant one by one deliberate change, so the expected
problem is known by construction (Cross-check: the rule of docs/archive.md that was broken).
"""

from __future__ import annotations

import json
import shutil

import h5py
import numpy as np
import pytest

from ensemble import open_archive
from ensemble.archive import ArchiveWriter, verify_archive
from ensemble.archive import schema
from ensemble.cli import main as cli_main
from ensemble.errors import InputError

CLOCKS = ["HM1", "CS1", "CS2", "OUT"]


def build(path, n=30, seed=5):
    """A conformant 4-clock archive with events, steering, state and two runs."""
    rng = np.random.default_rng(seed)
    state = np.full((n, 4), schema.ACTIVE, dtype=np.int8)
    state[:, 3] = schema.MONITOR
    state[n // 2:, 2] = schema.EXCLUDED
    raw = rng.random((n, 4)) + 0.2
    raw[state != schema.ACTIVE] = 0.0
    block = {"mjd": 60676.0 + np.arange(n) / 24.0,
             "offset_s": rng.normal(0, 1e-9, (n, 4)), "frequency": rng.normal(0, 1e-13, (n, 4)),
             "drift_per_s": rng.normal(0, 1e-19, (n, 4)),
             "weight": raw / raw.sum(axis=1, keepdims=True), "state": state}
    first = {k: v[: n // 2] for k, v in block.items()}
    second = {k: v[n // 2:] for k, v in block.items()}
    attrs = {"config_toml": "[steering]\ntime_constant_d = 20.0\n", "input_sha256": "ab" * 32,
             "created_utc": "2026-01-01T00:00:00Z"}
    with ArchiveWriter.create(path, CLOCKS, attrs) as w:
        w.append_epochs(first)
        w.append_steering({"mjd": first["mjd"][-1:], "frequency_correction": [2e-15],
                           "phase_error": [-3.0e-9]})
        w.add_run_record("day1.csv", time_utc="2026-01-01T01:00:00Z")
    with ArchiveWriter.open_for_append(path, {"input_sha256": "cd" * 32}) as w:
        w.append_epochs(second)
        w.append_events([{"mjd": float(second["mjd"][0]), "clock": "CS2",
                          "kind": "frequency_step", "magnitude": 4e-14, "score": 9.5}])
        w.append_steering({"mjd": second["mjd"][-1:], "frequency_correction": [-5e-16],
                           "phase_error": [-1.0e-9]})
        w.write_state({"covariance": np.eye(3)})
        w.add_run_record("day2.csv", time_utc="2026-01-02T01:00:00Z")
    return block


@pytest.fixture
def archive(tmp_path):
    path = tmp_path / "lab.h5"
    build(path)
    assert verify_archive(path) == []
    return path


def damaged(archive, tmp_path, change) -> "pathlib.Path":
    target = tmp_path / "bad.h5"
    shutil.copyfile(archive, target)
    with h5py.File(target, "r+") as f:
        change(f)
    return target


def one_line_error(path, match):
    with pytest.raises(InputError, match=match) as info:
        open_archive(path)
    assert "\n" not in str(info.value) and str(path) in str(info.value)
    with pytest.raises(InputError, match=match):
        ArchiveWriter.open_for_append(path)
    return str(info.value)


def test_not_hdf5_empty_and_truncated(archive, tmp_path):
    text = tmp_path / "notes.h5"
    text.write_text("mjd,clock,reference,phase\n")
    one_line_error(text, "not an HDF5 file")
    empty = tmp_path / "empty.h5"
    empty.write_bytes(b"")
    one_line_error(empty, "not an HDF5 file")
    cut = tmp_path / "cut.h5"
    data = archive.read_bytes()
    cut.write_bytes(data[: len(data) // 2])
    one_line_error(cut, "truncated")
    for path in (text, empty, cut):
        assert len(verify_archive(path)) == 1
    assert text.read_text() == "mjd,clock,reference,phase\n"           # never touched
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == []
    with pytest.raises(InputError, match="archive not found"):
        open_archive(tmp_path / "missing.h5")


@pytest.mark.parametrize("change, match", [
    (lambda f: f.attrs.__setitem__("format_version", 2), "format_version 2 is newer"),
    (lambda f: f.attrs.__setitem__("format_version", "one"), "expected an integer"),
    (lambda f: f.attrs.__delitem__("format_version"), "not an ensemble archive"),
    (lambda f: f.__delitem__("/scale/weight"), "dataset /scale/weight is missing"),
    (lambda f: f.__delitem__("/events"), "dataset /events is missing"),
])
def test_unreadable_archives(archive, tmp_path, change, match):
    bad = damaged(archive, tmp_path, change)
    one_line_error(bad, match)
    assert verify_archive(bad)


def _set(path, index, value):
    def change(f):
        data = f[path][...]
        data[index] = value
        f[path][...] = data
    return change


@pytest.mark.parametrize("change, expected", [
    (_set("/scale/weight", (3, 0), 0.9), "/scale/weight: 1 rows do not sum to 1"),
    (_set("/scale/weight", (3, 3), 1e-3), "give weight to a clock that is not active"),
    (_set("/scale/state", (4, 1), 7), "/scale/state: 1 cells hold an unknown state code"),
    (_set("/epochs/mjd", 6, 60000.0), "/epochs/mjd: not strictly increasing"),
    (lambda f: f["/scale/state"].attrs.__setitem__("codes", '{"0": "absent"}'), "attribute codes"),
    (lambda f: f["/scale/drift"].attrs.__delitem__("units"), "/scale/drift: attribute units"),
    (lambda f: f["/steering"].attrs.__delitem__("description"), "/steering: attribute description"),
    (lambda f: f.attrs.__setitem__("config_toml", "[broken"), "config_toml: not valid TOML"),
    (lambda f: f.attrs.__setitem__("input_sha256", "xyz"), "input_sha256"),
    (lambda f: f.attrs.__delitem__("created_utc"), "created_utc: missing"),
    (lambda f: f["/state"].create_dataset("names", data=["a"], dtype=h5py.string_dtype()),
     "/state/names: dtype"),
    (lambda f: f["/steering"].resize((3,)), "/steering: rows are not sorted by mjd"),
])
def test_verifier_names_each_broken_rule(archive, tmp_path, change, expected):
    bad = damaged(archive, tmp_path, change)
    problems = verify_archive(bad)
    assert any(expected in p for p in problems), problems
    with open_archive(bad) as a:            # still readable: these are conformance problems
        assert a.n_epochs == 30


def test_reader_content_and_units(archive):
    block = build(archive.parent / "again.h5")
    with open_archive(archive) as a:
        assert a.format_version == 1 and a.clocks == tuple(CLOCKS)
        assert a.config == {"steering": {"time_constant_d": 20.0}}
        assert a.units["/scale/offset"] == "s" and a.units["/scale/drift"] == "1/d"
        assert a.units["/events"]["magnitude"].startswith("s (outlier")
        assert a.descriptions["/epochs/mjd"] == "epoch of each row, Modified Julian Date in UTC"
        assert a.state_codes == schema.STATE_CODES
        np.testing.assert_array_equal(a.weight.to_numpy(), block["weight"])
        np.testing.assert_array_equal(a.state.to_numpy(), block["state"])
        assert list(a.epochs_utc[:2].strftime("%Y-%m-%dT%H:%M:%SZ")) == [
            "2025-01-01T00:00:00Z", "2025-01-01T01:00:00Z"]   # Cross-check: MJD 60676 = 2025-01-01
        part = a.frame("/scale/offset", 60676.0 + 10 / 24, 60676.0 + 12 / 24)
        assert len(part) == 3
        assert a.events["kind"].tolist() == ["frequency_step"]
        assert a.steering["phase_error"].tolist() == [-3.0e-9, -1.0e-9]
        assert a.provenance["input_name"].tolist() == ["day1.csv", "day2.csv"]
        np.testing.assert_array_equal(a.engine_state["covariance"], np.eye(3))
    assert a.closed
    with pytest.raises(ValueError, match="closed"):
        a.offset


def test_inspect_text_json_and_exit_codes(archive, tmp_path, capsys):
    assert cli_main(["inspect", str(archive), "--events", "5"]) == 0
    text = capsys.readouterr().out
    for line in ("span       MJD 60676.000000 to 60677.208333  (2025-01-01T00:00:00Z to "
                 "2025-01-02T05:00:00Z), 30 epochs, every 1 h",
                 "events     1 (frequency_step 1)", "runs       2",
                 "verdict    conforms to archive format 1"):
        assert line in text, text
    assert "OUT          monitor" in text and "CS2          excluded" in text
    assert "operator review" in text
    assert cli_main(["inspect", str(archive), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["conformant"] is True and summary["problems"] == []
    assert [c["clock"] for c in summary["clocks"]] == CLOCKS
    assert sum(c["weight"] for c in summary["clocks"]) == pytest.approx(1.0, abs=1e-12)
    st = summary["steering"]
    assert st["count"] == 2 and st["frequency_correction"] == -5e-16
    assert st["total_frequency_correction"] == pytest.approx(1.5e-15, rel=1e-12)
    assert st["phase_error_s"] == -1.0e-9
    assert summary["run_count"] == 2 and summary["runs"][-1]["mode"] == "append"
    bad = damaged(archive, tmp_path, _set("/scale/weight", (0, 0), 5.0))
    assert cli_main(["inspect", str(bad)]) == 2
    captured = capsys.readouterr()
    assert "does NOT conform" in captured.out and "does not conform" in captured.err
    junk = tmp_path / "junk.h5"
    junk.write_text("hello")
    assert cli_main(["inspect", str(junk)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "not an HDF5 file" in err
