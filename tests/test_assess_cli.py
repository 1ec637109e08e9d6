"""``ensemble assess``: output, the /assessment group, plots, exit codes."""

import json
import shutil

import h5py
import numpy as np
import pytest

from ensemble import append, cli, open_archive
from ensemble.archive import verify_archive
from ensemble.assess import assess_archive
from ensemble.assess.core import read_archive
from ensemble.pipeline import run_to_archive
from ensemble.simulate import lab_scenario, simulate
from ensemble.simulate.csvout import write_long_csv

from test_assess_verdicts import build_archive

CONTRACT_VERDICTS = {"keep", "watch", "retire"}


@pytest.fixture(scope="module")
def small_archive(tmp_path_factory):
    scenario = lab_scenario({"hydrogen_maser": 1, "cesium_standard": 2, "rubidium": 1}, 20.0,
                            seed=21, white_pm_s=3e-12)
    path, _ = build_archive(tmp_path_factory.mktemp("small"), scenario)
    return path


@pytest.fixture
def archive(small_archive, tmp_path):
    copy = tmp_path / "lab.h5"
    shutil.copyfile(small_archive, copy)
    return copy


def _run(capsys, *argv):
    code = cli.main(["assess", *map(str, argv)])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_json_has_the_contract_keys_and_leaves_the_file_alone(capsys, archive):
    before = archive.read_bytes()
    code, out, _ = _run(capsys, archive, "--json", "--no-store")
    assert code == 0
    rows = json.loads(out)
    assert [r["clock"] for r in rows] == ["C01", "C02", "H01", "R01"]
    for r in rows:
        # the interface (docs/assessment.md, --json): at least clock, verdict in {keep, watch, retire}, reasons
        assert r["verdict"] in CONTRACT_VERDICTS
        assert r["reasons"] and all(isinstance(t, str) and t for t in r["reasons"])
        assert {"hdev", "adev", "noise", "frequency", "drift_per_day", "events", "weight",
                "ageing", "holdover", "what_if"} <= set(r)
        assert [p["tau"] for p in r["hdev"]] == [3600.0, 86400.0]     # 10 d needs 40 d
    assert archive.read_bytes() == before


def test_store_writes_a_conforming_assessment_group(capsys, archive):
    code, out, _ = _run(capsys, archive)
    assert code == 0 and "clock assessment of" in out and "advisory" in out
    assert verify_archive(archive) == []
    with open_archive(archive) as a:
        assert a.provenance["mode"].tolist() == ["create", "assess"]
        assert a.provenance["epochs_added"].tolist()[-1] == 0
        clocks = a.table("/assessment/clocks")
        assert clocks["clock"].tolist() == list(a.clocks)
        assert set(clocks["verdict"]) <= CONTRACT_VERDICTS
        for text in clocks["reasons"]:
            assert json.loads(text) and all(isinstance(t, str) for t in json.loads(text))
        group = a.group("/assessment")
        assert group["hdev"].shape == (4, 2)
        assert group["holdover_time"].shape == (4, 2)
    with h5py.File(archive) as f:
        def check(name, obj):
            if isinstance(obj, h5py.Dataset):
                assert obj.attrs["units"] and obj.attrs["description"], name
        f["/assessment"].visititems(check)
    leftovers = [p.name for p in archive.parent.iterdir() if ".tmp-" in p.name]
    assert leftovers == []
    # a second assessment replaces the group and adds one more record
    assert _run(capsys, archive, "-q")[0] == 0
    with open_archive(archive) as a:
        assert a.provenance["mode"].tolist() == ["create", "assess", "assess"]


def test_what_if_and_plots(capsys, archive, tmp_path):
    plots = tmp_path / "plots"
    code, out, _ = _run(capsys, archive, "--json", "--what-if", "--no-store", "--plots", plots)
    assert code == 0
    rows = {r["clock"]: r for r in json.loads(out)}
    for r in rows.values():
        w = r["what_if"]
        assert w is not None and w["error"] is None
        assert w["role"] in ("leans on", "better without", "not needed", "minor")
    # the only maser carries the scale: leaving it out must make the scale worse
    assert rows["H01"]["what_if"]["role"] == "leans on"
    files = sorted(p.name for p in plots.iterdir())
    assert files == ["assessment_C01.png", "assessment_C02.png", "assessment_H01.png",
                     "assessment_R01.png", "assessment_overview.png"]
    assert all((plots / f).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for f in files)


def test_config_changes_the_judged_averaging_times(capsys, archive, tmp_path):
    cfg = tmp_path / "a.toml"
    cfg.write_text("[assessment]\ntaus_s = [7200.0]\n\n[clocks.C01]\ntype = \"rubidium\"\n")
    code, out, _ = _run(capsys, archive, "--json", "--no-store", "--config", cfg)
    assert code == 0
    rows = {r["clock"]: r for r in json.loads(out)}
    assert [p["tau"] for p in rows["C02"]["hdev"]] == [7200.0]
    assert rows["C01"]["type_compared"] == "rubidium"
    assert rows["C01"]["type_configured"] == "rubidium"


@pytest.mark.parametrize("content, key", [
    ("[assessment]\nbogus = 1\n", "assessment.bogus"),
    ("[assessment]\ntaus_s = [3600.0, -1.0]\n", "assessment.taus_s"),
    ("[assessment]\ntype_watch_factor = 5.0\n", "assessment.type_retire_factor"),
    ("[assessment]\nauto_type = \"nearest\"\n", "assessment.auto_type"),
])
def test_bad_configuration_exits_2(capsys, archive, tmp_path, content, key):
    cfg = tmp_path / "bad.toml"
    cfg.write_text(content)
    before = archive.read_bytes()
    code, out, err = _run(capsys, archive, "--config", cfg)
    assert code == 2 and out == ""
    assert err.startswith("error: ") and f"key '{key}'" in err and err.count("\n") == 1
    assert archive.read_bytes() == before


def test_bad_archives_exit_2(capsys, tmp_path, archive):
    code, _, err = _run(capsys, tmp_path / "missing.h5")
    assert code == 2 and "missing.h5" in err
    not_h5 = tmp_path / "text.h5"
    not_h5.write_text("mjd,clock\n")
    assert _run(capsys, not_h5)[0] == 2
    a_file = tmp_path / "plots.txt"
    a_file.write_text("")
    code, _, err = _run(capsys, archive, "--plots", a_file)
    assert code == 2 and "--plots must name a folder" in err


def test_a_short_archive_is_refused(capsys, tmp_path):
    scenario = lab_scenario({"cesium_standard": 3}, 0.5, seed=1)      # 12 epochs
    path, _ = build_archive(tmp_path, scenario, name="short")
    code, _, err = _run(capsys, path)
    assert code == 2 and "at least 16" in err


def test_two_clocks_are_assessed_without_a_hat(capsys, tmp_path):
    scenario = lab_scenario({"cesium_standard": 2}, 10.0, seed=2)
    path, _ = build_archive(tmp_path, scenario, name="pair")
    code, out, _ = _run(capsys, path, "--json", "--no-store")
    assert code == 0
    for r in json.loads(out):
        assert r["verdict"] == "keep"
        assert any("not estimated" in t for t in r["reasons"])
        assert all(p["value"] is None for p in r["hdev"])
        assert np.isfinite(r["frequency"]["value"])


def test_run_record_mode_is_checked(archive):
    from ensemble.archive import ArchiveWriter

    with pytest.raises(ValueError, match="mode must be one of"):
        with ArchiveWriter.open_for_append(archive) as w:
            w.add_run_record("x", mode="repair")
    with open_archive(archive) as a:
        assert a.provenance["mode"].tolist() == ["create"]


def test_appended_archive_is_compared_like_one_run(tmp_path):
    # An archive continued with --append under the same configuration is the scale of one run
    # (docs/engine.md, incremental runs), so the what-if compares with it directly.
    sim = simulate(lab_scenario({"hydrogen_maser": 1, "cesium_standard": 3}, 16.0, seed=4))
    first, second = tmp_path / "a.csv", tmp_path / "b.csv"
    half = sim.n_epochs // 2
    write_long_csv(first, sim.mjd[:half], sim.clocks, sim.phase_s[:half], sim.reference[:half])
    write_long_csv(second, sim.mjd[half:], sim.clocks, sim.phase_s[half:],
                   sim.reference[half:])
    path = tmp_path / "lab.h5"
    run_to_archive(first, path)
    append(second, path)
    assert read_archive(path).one_run
    a = assess_archive(path, what_if=True)
    assert not any("differs from the archive" in m for m in a.messages)
    assert a.record("H01").what_if.role == "leans on"
