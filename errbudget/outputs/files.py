"""Writing outputs safely: temporary file then rename, so nothing is ever half-written."""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

READABLE = 0o644  # outputs are meant to be shared: owner writes, everyone reads


def write_all_atomic(files: dict[Path, str]) -> None:
    """Write several files as one set: every temporary first, then the renames together.

    A failure while writing the temporaries (disk full, permissions, an interrupt) removes
    them and leaves every earlier file as it was. Only the renames are left as a window:
    each ``os.replace`` is atomic, but a crash between two of them (microseconds, no
    Python code runs in between other than the loop) would leave some new files beside
    some old ones.
    """
    staged: list[tuple[str, Path]] = []
    try:
        for path, text in files.items():
            path.parent.mkdir(parents=True, exist_ok=True)
            handle, temporary = tempfile.mkstemp(
                prefix=f".{path.name}.", suffix=".tmp", dir=path.parent
            )
            staged.append((temporary, path))
            with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as stream:
                stream.write(text)
                stream.flush()
                os.fsync(stream.fileno())
            os.chmod(temporary, READABLE)
        for temporary, path in staged:
            os.replace(temporary, path)
    except BaseException:
        for temporary, _ in staged:
            Path(temporary).unlink(missing_ok=True)
        raise


def dumps(data: dict) -> str:
    """budget.json text: strict JSON (no NaN or infinity), stable key order as built."""
    return json.dumps(data, indent=2, allow_nan=False, ensure_ascii=False) + "\n"
