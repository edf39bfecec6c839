from pathlib import Path

import pytest

from coldindex import config as C
from coldindex.config import IndexOptions, parse_column_map
from coldindex.errors import ConfigError
from coldindex.io.files import load_config


def test_parse_column_map():
    assert parse_column_map("year=Yr, bottom_c=TempBottom") == {"year": "Yr",
                                                                "bottom_c": "TempBottom"}
    assert parse_column_map(None) == {}
    with pytest.raises(ConfigError, match="ours=theirs"):
        parse_column_map("year")


def test_options_validated_with_key_and_allowed_values():
    with pytest.raises(ConfigError, match=r"index.method needs to be one of kriging, idw"):
        IndexOptions(method="spline")
    with pytest.raises(ConfigError, match="index.min_coverage"):
        IndexOptions(min_coverage=1.5)


def test_one_mapping_names_the_key_in_the_config_and_the_flag_on_a_command():
    with pytest.raises(ConfigError, match=r"^skill.lags needs to be .*got: 'zero to two'\.$"):
        C.build(C.SkillConfig, {"lags": "zero to two"})
    with pytest.raises(ConfigError, match=r"^--lags needs to be .*got: 'zero to two'\.$"):
        C.from_flags(C.SkillConfig, lags="zero to two")
    # the user's value is quoted as given, underscores and all
    with pytest.raises(ConfigError, match=r"project.adjust .*got: 'my_model'"):
        C.build(C.ProjectConfig, {"adjust": "my_model"})
    with pytest.raises(ConfigError, match=r"--p-max needs"):
        C.from_flags(C.ShiftsConfig, p_max=1.5)
    assert C.option_name("shifts", "column", flag=True) == "--value"
    assert C.option_name("shifts", "column", flag=False) == "shifts.column"


def test_months_and_lags_parsed_once_and_strictly():
    assert C.parse_months("11-2") == [11, 12, 1, 2]
    assert C.parse_months("5-10") == [5, 6, 7, 8, 9, 10]
    for bad in ("13-2", "0-3", "1,1,2", "x"):
        with pytest.raises(ValueError, match="skill.months"):
            C.parse_months(bad)
    assert C.parse_lags("2,0") == [0, 2]
    with pytest.raises(ValueError, match="spanning at most"):
        C.parse_lags("0-20")
    with pytest.raises(ConfigError, match="skill.outlook_lag"):
        C.SkillConfig(lags="0-1", outlook_lag=3)


def test_flags_read_lists_from_text():
    assert C.from_flags(C.IndexOptions, thresholds="2,0.5").thresholds == (2.0, 0.5)
    assert C.from_flags(C.CovariatesConfig, lags="1,2").lags == (1, 2)
    with pytest.raises(ConfigError, match="--thresholds needs to be a list of numbers"):
        C.from_flags(C.IndexOptions, thresholds="2,a")


def test_load_config_resolves_paths_and_refuses_unknown_keys(tmp_path: Path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[inputs]\ncasts = "casts.csv"\n[columns]\nyear = "Yr"\n'
                   '[index]\nthresholds = [2.0, 1.5, 0.0]\nsims = 10\n')
    c = load_config(cfg)
    assert c.inputs.casts == tmp_path / "casts.csv"
    assert c.columns == {"year": "Yr"}
    assert c.index.thresholds == (2.0, 1.5, 0.0) and c.index.sims == 10
    cfg.write_text("[index]\nsimz = 3\n")
    with pytest.raises(ConfigError, match="index.simz is not a known key"):
        load_config(cfg)
    cfg.write_text("[index]\nsims = 'many'\n")
    with pytest.raises(ConfigError, match="index.sims needs to be a whole number"):
        load_config(cfg)
    cfg.write_text("[index]\nsims = 10.0\n")
    with pytest.raises(ConfigError, match="index.sims needs to be a whole number, got: 10.0"):
        load_config(cfg)
    cfg.write_text("[colour]\n")
    with pytest.raises(ConfigError, match=r"\[colour\] is not a known table"):
        load_config(cfg)
    cfg.write_text("[index\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(cfg)
    cfg.write_text("[index]\nthresholds = [1.5]\n")  # classify.columns needs below_2c_km2
    with pytest.raises(ConfigError, match="classify.columns names 'below_2c_km2'"):
        load_config(cfg)


def test_replace_validates():
    c = C.Config().replace(index={"sims": 4}, shifts={"boot": 9})
    assert c.index.sims == 4 and c.shifts.boot == 9 and c.index.grid_km == 5.0
    with pytest.raises(ConfigError, match="index.sims"):
        C.Config().replace(index={"sims": -1})


def test_template_validates_as_written_and_shows_every_option(tmp_path: Path):
    text = C.template("casts.csv")
    (tmp_path / "coldindex.toml").write_text(text)
    c = load_config(tmp_path / "coldindex.toml")
    assert c.inputs.casts == tmp_path / "casts.csv"
    assert c.inputs.domain is None and c.inputs.trajectories == ()  # optional ones off
    for table, cls in C._STAGE_TABLES.items():
        assert getattr(c, table) == cls()  # defaults as written
        for key, field in cls.model_fields.items():
            if field.description:
                assert f"# {key} = " in text


def test_registries_match_the_implementations():
    from coldindex import fitting, interpolate, project, regimes

    assert tuple(C.FAMILIES) == tuple(interpolate.FAMILIES)
    assert tuple(C.FITS) == tuple(fitting.FIT_METHODS)
    assert tuple(C.ADJUSTMENTS) == tuple(project.ADJUSTMENTS)
    assert tuple(C.DETECTORS) == tuple(regimes.METHODS)


def test_sample_config_is_valid():
    from tests.conftest import SAMPLE

    c = load_config(SAMPLE / "coldindex.toml")
    assert c.inputs.casts is not None and c.inputs.casts.is_file()
