"""Incremental runs: appending pieces one by one equals one run over the whole."""

from __future__ import annotations

import functools

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from ensemble.config import parse_config
from ensemble.errors import InputError
from ensemble.pipeline import append_to_archive, run_to_archive
from ensemble.simulate import lab_scenario, simulate

#: A short start-up stretch keeps these runs small; the scenario has a gap and anomalies.
CONFIG = parse_config({"ensemble": {"startup_days": 2.0}})
GAP_DAY, STEP_DAY, OUTLIER_DAY = 5.0, 7.0, 9.5


@functools.lru_cache(maxsize=1)
def _scenario_csv() -> tuple[str, list[str], list[float]]:
    scenario = lab_scenario({"hydrogen_maser": 2, "cesium_standard": 2, "rubidium": 1}, 12.0,
                            seed=11, anomalies=[
                                {"kind": "gap", "clock": "*", "day": GAP_DAY,
                                 "duration_days": 0.25},
                                {"kind": "phase_step", "clock": "C01", "day": STEP_DAY,
                                 "size_s": 3e-9},
                                {"kind": "outlier", "clock": "R01", "day": OUTLIER_DAY,
                                 "size_s": 5e-8}])
    import tempfile
    import pathlib
    path = pathlib.Path(tempfile.mkdtemp()) / "all.csv"
    simulate(scenario).to_csv(path)
    lines = path.read_text().splitlines()
    mjds = sorted({float(line.split(",")[0]) for line in lines[1:]})
    return str(path), lines, mjds


def _pieces(tmp_path, cuts):
    _, lines, mjds = _scenario_csv()
    header, rows = lines[0], lines[1:]
    edges = [mjds[0]] + [mjds[c] for c in cuts] + [np.inf]
    files = []
    for i in range(len(edges) - 1):
        sel = [r for r in rows if edges[i] <= float(r.split(",")[0]) < edges[i + 1]]
        f = tmp_path / f"piece{i}.csv"
        f.write_text(header + "\n" + "\n".join(sel) + "\n")
        files.append(f)
    return files


def _contents(path) -> dict:
    out = {}
    with h5py.File(path, "r") as f:
        def visit(name, obj):
            if isinstance(obj, h5py.Dataset) and not name.startswith("provenance"):
                out[name] = obj[()]
        f.visititems(visit)
    return out


def _assert_same(a: dict, b: dict) -> None:
    assert sorted(a) == sorted(b)
    for name in a:
        x, y = a[name], b[name]
        assert x.shape == y.shape, name
        if x.dtype.names:
            for field in x.dtype.names:
                assert np.array_equal(x[field], y[field],
                                      equal_nan=x[field].dtype.kind == "f"), (name, field)
        else:
            assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), name


@functools.lru_cache(maxsize=1)
def _whole(tmp_dir: str) -> dict:
    import pathlib
    out = pathlib.Path(tmp_dir) / "whole.h5"
    run_to_archive(_scenario_csv()[0], out, config=CONFIG)
    return _contents(out)


@pytest.fixture(scope="module")
def whole(tmp_path_factory):
    return _whole(str(tmp_path_factory.mktemp("whole")))


def _split_run(tmp_path, cuts):
    files = _pieces(tmp_path, cuts)
    target = tmp_path / "split.h5"
    run_to_archive(files[0], target, config=CONFIG)
    reformed = []
    for f in files[1:]:
        reformed.append(append_to_archive(f, target).reformed)
    return target, reformed


def test_split_inside_a_gap_and_after_anomalies_is_bit_identical(tmp_path, whole):
    # Cross-check: the same computation in one piece (the archive contents must be equal,
    # bit for bit: hourly epochs make every time value an exact float).
    _, _, mjds = _scenario_csv()
    start = mjds[0]
    in_gap = int(np.searchsorted(mjds, start + GAP_DAY + 0.1))
    after_step = int(np.searchsorted(mjds, start + STEP_DAY)) + 1
    after_outlier = int(np.searchsorted(mjds, start + OUTLIER_DAY)) + 1
    target, reformed = _split_run(tmp_path, [10, in_gap, after_step, after_outlier])
    assert reformed[0] is True       # the first piece was shorter than the start-up stretch
    assert reformed[1:] == [False, False, False]
    _assert_same(whole, _contents(target))
    with h5py.File(target) as f:
        assert f["provenance"].shape == (5,)


N_EPOCHS = 282   # epochs of the scenario (12 days hourly, less the 6 h gap)


def test_scenario_size():
    assert len(_scenario_csv()[2]) == N_EPOCHS


@settings(max_examples=6, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.integers(2, N_EPOCHS - 1), min_size=1, max_size=3, unique=True))
def test_random_splits_equal_one_run(tmp_path_factory, cuts):
    # the first run needs two epochs to find the sampling interval; later pieces may hold one
    tmp = tmp_path_factory.mktemp("split")
    target, _ = _split_run(tmp, sorted(cuts))
    _assert_same(_whole(str(tmp_path_factory.getbasetemp())), _contents(target))


def test_overlap_and_going_back_are_refused(tmp_path):
    files = _pieces(tmp_path, [100, 200])
    target = tmp_path / "a.h5"
    run_to_archive(files[0], target, config=CONFIG)
    append_to_archive(files[1], target)
    before = target.read_bytes()
    with pytest.raises(InputError, match="not after the archive's last epoch") as info:
        append_to_archive(files[1], target)
    assert info.value.row == 2 and info.value.column == "mjd"
    assert target.read_bytes() == before


def test_single_epoch_append(tmp_path):
    _, lines, mjds = _scenario_csv()
    files = _pieces(tmp_path, [100])
    target = tmp_path / "a.h5"
    run_to_archive(files[0], target, config=CONFIG)
    one = tmp_path / "one.csv"
    one.write_text(lines[0] + "\n" + "\n".join(
        r for r in lines[1:] if float(r.split(",")[0]) == mjds[100]) + "\n")
    result = append_to_archive(one, target)
    assert result.mjd.size == 1
    with h5py.File(target) as f:
        assert f["epochs/mjd"].shape == (101,)


def test_archive_without_state_is_refused(tmp_path):
    from ensemble.archive import ArchiveWriter

    target = tmp_path / "bare.h5"
    with ArchiveWriter.create(target, ["A", "B"], {"config_toml": "", "input_sha256": "0" * 64}) as w:
        w.append_epochs({"mjd": np.array([61041.0]), "offset_s": np.zeros((1, 2)),
                         "frequency": np.zeros((1, 2)), "drift_per_s": np.zeros((1, 2)),
                         "weight": np.array([[0.5, 0.5]]), "state": np.full((1, 2), 2)})
        w.add_run_record("x.csv")
    files = _pieces(tmp_path, [100])
    with pytest.raises(InputError, match="no saved engine state"):
        append_to_archive(files[1], target)
