"""Writing outputs safely: temporary file then rename, so nothing is ever half-written."""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

READABLE = 0o644  # outputs are meant to be shared: owner writes, everyone reads


def write_atomic(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file in the same folder and a rename."""
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as stream:
            stream.write(text)
            stream.flush()
            os.fsync(stream.fileno())
        os.chmod(temporary, READABLE)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def dumps(data: dict) -> str:
    """budget.json text: strict JSON (no NaN or infinity), stable key order as built."""
    return json.dumps(data, indent=2, allow_nan=False, ensure_ascii=False) + "\n"
