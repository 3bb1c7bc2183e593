"""Run configuration: the packaged ``default`` config documents every key; other files override only what differs.

The named configs (``default``, ``topdown``, ``fast``, ``ci``) ship inside the package, in ``detdiff/configs/``,
and are read with :mod:`importlib.resources`, so an installed wheel finds them from any working folder.
``detdiff config show NAME`` prints one for editing.
"""

from __future__ import annotations

import copy
from importlib.resources import files
from pathlib import Path
from typing import TYPE_CHECKING, Any

import yaml

from detdiff.atomic import write_text_atomic

if TYPE_CHECKING:
    from importlib.resources.abc import Traversable

CONFIG_DIR: Traversable = files("detdiff").joinpath("configs")
DEFAULT_CONFIG: Traversable = CONFIG_DIR.joinpath("default.yaml")
#: values of ``train.flips`` (the keys of :data:`detdiff.train.batches.FLIP_MODES`, listed here without torch)
FLIP_CHOICES = ("none", "horizontal", "both", "dihedral")


class ConfigError(ValueError):
    """A config file or override that does not fit the documented keys."""


def _merge(base: dict, override: dict, where: str) -> dict:
    out = copy.deepcopy(base)
    for key, value in override.items():
        if key not in base:
            raise ConfigError(f"{where}: unknown key '{key}' (expected one of: {', '.join(sorted(base))})")
        if isinstance(base[key], dict):
            if not isinstance(value, dict):
                raise ConfigError(f"{where}: '{key}' must be a mapping, got {type(value).__name__}")
            out[key] = _merge(base[key], value, f"{where}.{key}")
        else:
            out[key] = value
    return out


def _read_yaml(path: Path | Traversable) -> dict:
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise ConfigError(f"{path}: cannot read config: {exc}") from exc
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: a config must be a mapping of sections, got {type(data).__name__}")
    return data


def packaged_configs() -> list[str]:
    """Names of the configs shipped in the package, ``default`` first, then alphabetical."""
    names = sorted(entry.name[:-len(".yaml")] for entry in CONFIG_DIR.iterdir() if entry.name.endswith(".yaml"))
    return sorted(names, key=lambda name: name != "default")


def packaged_config(name: str) -> Traversable:
    """The packaged config file called ``name`` (``fast`` or ``fast.yaml``); :class:`ConfigError` if none."""
    stem = name[:-len(".yaml")] if name.endswith(".yaml") else name
    if stem not in packaged_configs():
        raise ConfigError(f"{name}: no such packaged config (packaged: {', '.join(packaged_configs())})")
    return CONFIG_DIR.joinpath(f"{stem}.yaml")


def config_summary(name: str) -> str:
    """First sentence of a packaged config's opening comment (what it is for)."""
    first = packaged_config(name).read_text(encoding="utf-8").splitlines()[0].lstrip("# ").strip()
    return first.split(". ")[0].rstrip(".")


def resolve_config_path(name_or_path: str | Path) -> Path | Traversable:
    """Accept a YAML file's path, or the name of a packaged config (``fast`` or ``fast.yaml``)."""
    path = Path(name_or_path)
    if path.is_file():
        return path
    if path.name != str(name_or_path):
        raise ConfigError(f"{name_or_path}: no such config file")
    try:
        return packaged_config(str(name_or_path))
    except ConfigError:
        raise ConfigError(f"{name_or_path}: no such config file, nor a packaged config "
                          f"(packaged: {', '.join(packaged_configs())})") from None


def load_config(path: str | Path | None = None, overrides: dict[str, dict[str, Any]] | None = None) -> dict:
    """Return the default config merged with ``path`` (if given) and then ``overrides``.

    Unknown keys raise :class:`ConfigError` naming the file and the key, so a typo never passes silently.
    """
    config = _read_yaml(DEFAULT_CONFIG)
    if path is not None:
        resolved = resolve_config_path(path)
        config = _merge(config, _read_yaml(resolved), str(resolved))
    if overrides:
        cleaned = {s: {k: v for k, v in kv.items() if v is not None} for s, kv in overrides.items()}
        config = _merge(config, cleaned, "command line")
    return config


def load_saved_config(path: str | Path) -> dict:
    """A run folder's saved config, merged onto today's defaults so keys added since then have values."""
    return _merge(_read_yaml(DEFAULT_CONFIG), _read_yaml(Path(path)), str(path))


def save_config(config: dict, path: str | Path) -> None:
    """Write the config actually used, so a run can be repeated exactly."""
    write_text_atomic(path, yaml.safe_dump(config, sort_keys=False))


#: The value of a setting that the recipe (:mod:`detdiff.recipe`) resolves from the dataset.
AUTO = "auto"


def is_auto(value: Any) -> bool:
    """Whether a setting is ``auto`` (left to the recipe)."""
    return isinstance(value, str) and value.strip().lower() == AUTO


def time_limit_seconds(config: dict[str, Any]) -> float | None:
    """``train.time_limit`` (minutes of detector training; the recipe sets it to the detector's share of the budget)
    in seconds, or None: no limit (``none``, or ``auto`` that no recipe resolved)."""
    value = config["train"].get("time_limit")
    if value is None or is_auto(value) or str(value).strip().lower() == "none":
        return None
    try:
        minutes = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"train.time_limit must be minutes, none or auto, got {value!r}") from None
    if minutes <= 0:
        raise ConfigError(f"train.time_limit must be positive minutes, got {value!r}")
    return 60.0 * minutes


def time_limit_floor(config: dict[str, Any]) -> int:
    """The fewest epochs the time limit leaves the detector: ``recipe.min_epochs``, or ``train.epochs`` if fewer."""
    return min(int(config["train"]["epochs"]), int(config["recipe"]["min_epochs"]))
