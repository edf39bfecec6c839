from pathlib import Path

import pytest

from coldindex.config import IndexOptions, load_config, parse_column_map
from coldindex.errors import ConfigError


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


def test_load_config_resolves_paths_and_refuses_unknown_keys(tmp_path: Path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[inputs]\ncasts = "casts.csv"\n[columns]\nyear = "Yr"\n'
                   '[index]\nthresholds = [1.5]\nsims = 10\n')
    c = load_config(cfg)
    assert c.inputs.casts == tmp_path / "casts.csv"
    assert c.columns == {"year": "Yr"}
    assert c.index.thresholds == (1.5,) and c.index.sims == 10
    cfg.write_text("[index]\nsimz = 3\n")
    with pytest.raises(ConfigError, match="index.simz is not a known key"):
        load_config(cfg)
    cfg.write_text("[index]\nsims = 'many'\n")
    with pytest.raises(ConfigError, match="index.sims needs to be a whole number"):
        load_config(cfg)
    cfg.write_text("[colour]\n")
    with pytest.raises(ConfigError, match=r"\[colour\] is not a known table"):
        load_config(cfg)
    cfg.write_text("[index\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(cfg)


def test_sample_config_is_valid():
    from tests.conftest import SAMPLE

    c = load_config(SAMPLE / "coldindex.toml")
    assert c.inputs.casts is not None and c.inputs.casts.is_file()
