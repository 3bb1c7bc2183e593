"""Configs: every packaged file merges onto the documented defaults; unknown keys are refused."""

from __future__ import annotations

from pathlib import Path

import pytest

from detdiff.config import (CONFIG_DIR, DEFAULT_CONFIG, FLIP_CHOICES, ConfigError, load_config, packaged_config,
                            packaged_configs, resolve_config_path)


@pytest.mark.parametrize("name", ["default", "topdown", "fast", "ci"])
def test_shipped_configs_load(name: str) -> None:
    cfg = load_config(name)
    assert cfg["version"] == 1
    epochs = cfg["train"]["epochs"]
    assert epochs == "auto" or epochs > 0          # auto: fitted to the dataset by detdiff.recipe


def test_override_and_unknown_key() -> None:
    assert load_config("ci", {"train": {"epochs": 2, "seed": None}})["train"]["epochs"] == 2
    with pytest.raises(ConfigError, match="unknown key 'nope'"):
        load_config(None, {"train": {"nope": 1}})


def test_configs_are_package_resources() -> None:
    import detdiff

    assert Path(str(CONFIG_DIR)).parent == Path(detdiff.__file__).parent
    assert DEFAULT_CONFIG.is_file()
    assert packaged_configs() == ["default", "ci", "fast", "topdown"]
    assert packaged_config("fast.yaml").name == "fast.yaml"


def test_config_name_or_path(tmp_path, monkeypatch) -> None:
    own = tmp_path / "mine.yaml"
    own.write_text("train:\n  epochs: 2\n")
    assert load_config(own)["train"]["epochs"] == 2
    monkeypatch.chdir(tmp_path)
    (tmp_path / "fast").mkdir()                  # a folder named like a packaged config does not hide it
    assert resolve_config_path("fast") == packaged_config("fast")
    with pytest.raises(ConfigError, match="packaged: default, ci, fast, topdown"):
        load_config("nope")
    with pytest.raises(ConfigError, match="no such config file"):
        load_config("sub/fast.yaml")


def test_flip_choices_match_the_batch_maker() -> None:
    from detdiff.train.batches import FLIP_MODES

    assert tuple(FLIP_MODES) == FLIP_CHOICES
