"""configs/default.toml documents every setting and equals the defaults in code."""
from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.config import Config, default_toml, load_config
from pipeline.errors import ConfigError

DEFAULT = Path(__file__).resolve().parents[2] / "configs" / "default.toml"


def test_default_file_is_current_and_loads_to_the_defaults():
    assert DEFAULT.read_text() == default_toml(), \
        "regenerate: python -c 'from pipeline.config import default_toml; print(default_toml())'"
    assert load_config(DEFAULT) == Config()


def test_partial_override_and_errors(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text("[volumes]\nconnectivity = 6\n")
    config = load_config(path)
    assert config.volumes.connectivity == 6 and config.matching == Config().matching
    path.write_text("[volumes]\nconnectivity = 7\n")
    with pytest.raises(ConfigError, match="connectivity must be 6, 18 or 26"):
        load_config(path)
    path.write_text("[volumes]\nconnectivity = 'six'\n")
    with pytest.raises(ConfigError, match="must be int"):
        load_config(path)
    path.write_text("[nonsense]\n")
    with pytest.raises(ConfigError, match="unknown setting section nonsense"):
        load_config(path)
    path.write_text("[volumes\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(path)
