"""Configuration loading and validation."""

import tomllib

import pytest

from ensemble.config import default_config, load_config, parse_config
from ensemble.errors import ConfigError


def test_defaults_round_trip_as_toml():
    cfg = default_config()
    text = cfg.to_toml()
    again = parse_config(tomllib.loads(text))
    assert again.to_toml() == text
    assert cfg.ensemble.weight_cap == 0.0
    assert cfg.detection.hold_sigma == 3.5


@pytest.mark.parametrize("doc, key", [
    ({"ensembel": {}}, "ensembel"),
    ({"ensemble": {"weight_kap": 2.0}}, "ensemble.weight_kap"),
    ({"ensemble": {"weight_cap": 0.5}}, "ensemble.weight_cap"),
    ({"ensemble": {"probation_days": -1.0}}, "ensemble.probation_days"),
    ({"ensemble": {"drift_states": "yes"}}, "ensemble.drift_states"),
    ({"detection": {"false_alarm_rate": 0.5}}, "detection.false_alarm_rate"),
    ({"detection": {"window_epochs": 2}}, "detection.window_epochs"),
    ({"clocks": {"H1": {"type": "maser"}}}, "clocks.H1.type"),
    ({"clocks": {"H1": {"q1_s": -1e-26}}}, "clocks.H1.q1_s"),
    ({"clocks": {"bad name": {}}}, "clocks.bad name"),
])
def test_bad_keys_are_named(doc, key):
    with pytest.raises(ConfigError) as info:
        parse_config(doc, "lab.toml")
    assert info.value.key == key
    assert f"'{key}'" in str(info.value)
    assert "lab.toml" in str(info.value)


def test_unknown_key_lists_the_known_ones():
    with pytest.raises(ConfigError, match="known keys in \\[ensemble\\]: drift_states"):
        parse_config({"ensemble": {"nope": 1}})


def test_choices_are_listed():
    with pytest.raises(ConfigError, match="allowed: 'auto', 'hydrogen_maser'"):
        parse_config({"clocks": {"H1": {"type": "maser"}}})


def test_file_errors(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[ensemble\nx = 1\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(bad)
    enc = tmp_path / "enc.toml"
    enc.write_bytes(b"\xff\xfe[\x00")
    with pytest.raises(ConfigError, match="not UTF-8"):
        load_config(enc)
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "missing.toml")


def test_clock_tables_and_ints_for_floats():
    cfg = parse_config({"ensemble": {"probation_days": 3},
                        "clocks": {"H1": {"type": "hydrogen_maser", "q1_s": 1e-26}}})
    assert cfg.ensemble.probation_days == 3.0
    assert cfg.clock("H1").q1_s == 1e-26
    assert cfg.clock("ZZ").type == "auto"
    written = tomllib.loads(cfg.to_toml())["clocks"]["H1"]
    assert written["q1_s"] == 1e-26
    assert "q2_per_s" not in written  # NaN ("estimate") keys are not written


def test_shipped_default_config_is_current():
    # Regression: configs/default.toml is the output of `ensemble config`.
    from conftest import CONFIG_DIR
    from ensemble.config import documented_defaults
    assert (CONFIG_DIR / "default.toml").read_text() == documented_defaults()
    cfg = load_config(CONFIG_DIR / "default.toml")
    assert cfg.to_toml() == default_config().to_toml()


def test_shipped_run_configs_are_valid():
    from conftest import CONFIG_DIR
    for name in ("demo.toml", "steering_examples.toml"):
        load_config(CONFIG_DIR / name)


def _corpus():
    from conftest import DATA_DIR
    folder = DATA_DIR / "malformed_configs"
    rows = [line.split("|") for line in (folder / "README.md").read_text().splitlines()
            if line.startswith("| `")]
    return [(folder / r[1].strip().strip("`"), r[2].strip().strip("`")) for r in rows]


@pytest.mark.parametrize("path, fragment", _corpus(), ids=lambda v: getattr(v, "name", ""))
def test_malformed_configs_exit_2_and_leave_the_archive(tmp_path, capsys, path, fragment):
    from conftest import DATA_DIR
    from ensemble import cli
    archive = tmp_path / "lab.h5"
    archive.write_bytes(b"an existing archive")
    code = cli.main(["run", str(DATA_DIR / "example_long.csv"), "-o", str(archive),
                     "--config", str(path), "--overwrite"])
    out, err = capsys.readouterr()
    assert code == 2
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "Traceback" not in err
    assert fragment in lines[0]
    assert archive.read_bytes() == b"an existing archive"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["lab.h5"]


def test_config_corpus_is_large_enough():
    assert len(_corpus()) >= 30
