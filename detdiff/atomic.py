"""Write files so that a reader never sees half of one: write to a temporary name, then rename."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any


def write_text_atomic(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` through ``<path>.tmp-<pid>`` and ``os.replace``."""
    path = Path(path)
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def write_json_atomic(path: str | Path, data: Any, *, sort_keys: bool = False) -> Path:
    """JSON (indent 1; paths and other non-JSON values as strings) written atomically."""
    return write_text_atomic(path, json.dumps(data, indent=1, sort_keys=sort_keys, default=str) + "\n")
