"""The [assessment] section (ensemble/assess/settings.py) through the configuration loader."""

import dataclasses
import tomllib

import pytest

from ensemble.assess.settings import AssessmentSettings
from ensemble.config import load_config, parse_config
from ensemble.errors import ConfigError
from ensemble.settings import describe_section


def test_defaults_are_loaded_and_written_back():
    cfg = load_config(None)
    s = cfg.assessment
    assert s == AssessmentSettings()
    assert s.taus == (3600.0, 86400.0, 864000.0)
    assert s.budgets_s == (1e-7, 1e-6)
    again = parse_config(tomllib.loads(cfg.to_toml()))
    assert again.assessment == s


def test_every_key_is_documented():
    for key, default, unit, allowed, doc in describe_section(AssessmentSettings):
        assert doc and allowed, key
        if isinstance(default, float) and key not in ("confidence", "trend_alpha"):
            assert unit, key


def test_values_from_a_file(tmp_path):
    path = tmp_path / "lab.toml"
    path.write_text("[assessment]\ntaus_s = [86400, 3600]\nmax_frequency_steps = 5\n"
                    "auto_type = \"skip\"\nholdover_budgets_ns = [50.0]\n")
    s = load_config(path).assessment
    assert s.taus == (3600.0, 86400.0) and s.max_frequency_steps == 5
    assert s.auto_type == "skip" and s.budgets_s == (5e-8,)


@pytest.mark.parametrize("table, key", [
    ({"bogus": 1}, "assessment.bogus"),
    ({"taus_s": []}, "assessment.taus_s"),
    ({"taus_s": [3600.0, "1 d"]}, "assessment.taus_s"),
    ({"holdover_budgets_ns": [0.0]}, "assessment.holdover_budgets_ns"),
    ({"confidence": 1.5}, "assessment.confidence"),
    ({"window_step_days": 40.0}, "assessment.window_step_days"),
    ({"min_window_days": 45.0}, "assessment.min_window_days"),
    ({"type_watch_factor": 3.0, "type_retire_factor": 2.5}, "assessment.type_retire_factor"),
    ({"min_windows": 2}, "assessment.min_windows"),
])
def test_bad_values_name_the_key(table, key):
    with pytest.raises(ConfigError) as exc:
        parse_config({"assessment": table}, source="lab.toml")
    assert exc.value.key == key
    assert "lab.toml" in str(exc.value)


def test_settings_are_frozen():
    with pytest.raises(dataclasses.FrozenInstanceError):
        AssessmentSettings().trend_alpha = 0.5


def test_docs_list_every_key():
    from conftest import ROOT

    text = (ROOT / "docs" / "assessment.md").read_text(encoding="utf-8")
    for f in dataclasses.fields(AssessmentSettings):
        assert f"| `{f.name}` |" in text, f.name
