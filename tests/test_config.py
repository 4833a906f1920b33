"""Study configuration: defaults, readable errors, nothing written on a bad config."""

from __future__ import annotations

import pytest

from takeup.pipeline.cli import main
from takeup.schemas.config import ConfigError, StudyConfig, load_config, parse_config


def test_defaults():
    c = StudyConfig()
    assert c.allocation == {"treatment": 0.5, "control": 0.5}
    assert c.randomisation_unit == "individual"
    assert c.alerts.weak_first_stage_f == 10.0       # Staiger & Stock (1997) rule of thumb
    assert c.alerts.srm_p_value == 0.001             # common practice (Fabijan et al. 2019)
    assert c.treatment_share("anything") == 0.5


def test_site_allocation_override_and_groups():
    c = parse_config({"sites": [{"site_id": "A", "group": "North", "allocation": {"treatment": 0.7, "control": 0.3}},
                                {"site_id": "B"}]})
    assert c.treatment_share("A") == 0.7 and c.treatment_share("B") == 0.5
    assert c.site_group("A") == "North" and c.site_group("B") is None


@pytest.mark.parametrize("data,needles", [
    ({"studyid": "x"}, ["studyid", "did you mean 'study_id'", "accepted keys"]),
    ({"alerts": {"stale_dayz": 3}}, ["alerts.stale_dayz", "did you mean 'stale_days'"]),
    ({"sites": [{"site_id": "A", "grup": "N"}]}, ["sites[0].grup", "did you mean 'group'"]),
    ({"randomisation_unit": "household"}, ["randomisation_unit", "'individual' or 'cluster'", "'household'"]),
    ({"allocation": {"treatment": 0.7, "control": 0.4}}, ["allocation", "add up to 1"]),
    ({"allocation": {"treated": 0.5, "control": 0.5}}, ["unknown arm 'treated'"]),
    ({"follow_up": {"min_days": 30, "max_days": 10}}, ["follow_up", "max_days"]),
    ({"outcomes": [{"name": "a", "primary": True}, {"name": "b", "primary": True}]}, ["at most one outcome"]),
    ({"sites": [{"site_id": "A"}, {"site_id": "A"}]}, ["site 'A' appears twice"]),
    ({"alerts": {"srm_p_value": 2}}, ["alerts.srm_p_value", "less than 1"]),
])
def test_errors_name_field_value_and_accepted(data, needles):
    with pytest.raises(ConfigError) as err:
        parse_config(data, "study.toml")
    text = str(err.value)
    assert "study.toml" in text
    for n in needles:
        assert n in text, (n, text)


def test_bad_toml_and_missing_file(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text("study_id = \n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(p)
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "missing.toml")


def test_cli_init_with_bad_config_exits_2_and_writes_nothing(tmp_path, capsys, key_env):
    cfg = tmp_path / "study.toml"
    cfg.write_text('study_id = "x"\nrandomisation = "cluster"\n')
    w = tmp_path / "w.duckdb"
    assert main(["init", "--warehouse", str(w), "--config", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert "randomisation" in err and "did you mean 'randomisation_unit'" in err
    assert not w.exists()
    assert list(tmp_path.iterdir()) == [cfg]


def test_config_roundtrip_hash_is_stable():
    a = parse_config({"study_id": "s", "covariates": ["age"]})
    b = parse_config({"covariates": ["age"], "study_id": "s"})
    assert a.config_hash() == b.config_hash()
