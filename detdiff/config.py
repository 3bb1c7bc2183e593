"""Run configuration: ``configs/default.yaml`` documents every key; other files override only what differs."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import yaml

from detdiff.atomic import write_text_atomic

CONFIG_DIR = Path(__file__).resolve().parent.parent / "configs"
DEFAULT_CONFIG = CONFIG_DIR / "default.yaml"


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


def _read_yaml(path: Path) -> dict:
    try:
        data = yaml.safe_load(Path(path).read_text()) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise ConfigError(f"{path}: cannot read config: {exc}") from exc
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: a config must be a mapping of sections, got {type(data).__name__}")
    return data


def resolve_config_path(name_or_path: str | Path) -> Path:
    """Accept a path, or a bare name of a file in ``configs/`` (``fast`` or ``fast.yaml``)."""
    path = Path(name_or_path)
    if path.exists():
        return path
    for candidate in (CONFIG_DIR / f"{name_or_path}", CONFIG_DIR / f"{name_or_path}.yaml"):
        if candidate.exists():
            return candidate
    raise ConfigError(f"{name_or_path}: no such config file (also looked in {CONFIG_DIR})")


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
