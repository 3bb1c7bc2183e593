"""Configs: every shipped file merges onto the documented defaults; unknown keys are refused."""

from __future__ import annotations

import pytest

from detdiff.config import CONFIG_DIR, ConfigError, load_config


@pytest.mark.parametrize("name", ["default", "fast", "ci"])
def test_shipped_configs_load(name: str) -> None:
    cfg = load_config(name)
    assert cfg["version"] == 1
    epochs = cfg["train"]["epochs"]
    assert epochs == "auto" or epochs > 0          # auto: fitted to the dataset by detdiff.recipe


def test_override_and_unknown_key() -> None:
    assert load_config("ci", {"train": {"epochs": 2, "seed": None}})["train"]["epochs"] == 2
    with pytest.raises(ConfigError, match="unknown key 'nope'"):
        load_config(None, {"train": {"nope": 1}})


def test_config_dir_exists() -> None:
    assert (CONFIG_DIR / "default.yaml").exists()
