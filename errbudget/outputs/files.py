"""Writing outputs safely: temporary file then rename, so nothing is ever half-written, and
only ever inside ``--out/<case stem>/``: no link is followed, every fault is one sentence.
"""

from __future__ import annotations

import errno
import json
import os
import tempfile
from pathlib import Path

from errbudget.errors import InputError

READABLE = 0o644  # outputs are meant to be shared: owner writes, everyone reads
OUTPUT_NAMES = ("budget.json", "budget.html", "ladder.csv", "summary.csv")
HISTORY_NAME = "history.jsonl"
# The cause of an operating-system error, in words, by errno; others use the system's text.
CAUSES = {
    errno.ENOSPC: "the disk is full",
    errno.EDQUOT: "the disk quota is used up",
    errno.EROFS: "the file system is read-only",
    errno.EACCES: "permission denied",
    errno.EPERM: "the operation is not permitted",
    errno.ENOTDIR: "a part of the path is a file, not a folder",
    errno.EEXIST: "a file is in the way where a folder should be",
    errno.EISDIR: "it is a folder, not a file",
    errno.ELOOP: "it is a symbolic link, and outputs are never written through links",
    errno.ENAMETOOLONG: "the name is too long",
    errno.EIO: "the device reported an input/output error",
    errno.ENXIO: "it is not a regular file",
}


def environment_error(
    error: OSError, path: Path | str, doing: str = "write the outputs here"
) -> InputError:
    """One sentence for an operating-system fault on ``path``: exit code 2, no traceback."""
    cause = CAUSES.get(error.errno, error.strerror or type(error).__name__)
    return InputError(f"cannot {doing}: {cause}", str(path))


def check_stem(stem: str, case_path: Path) -> None:
    """A case file's stem names its output folder: it must be one plain folder name."""
    plain = stem not in ("", ".", "..") and not any(ord(c) < 32 or c in "/\\\x7f" for c in stem)
    if not plain:
        shown = "".join(repr(c)[1:-1] if ord(c) < 32 or c == "\x7f" else c for c in str(case_path))
        raise InputError(
            f"the file name gives the output folder name {stem!r}, which would not be a "
            "folder of its own inside --out; rename the case file",
            shown,  # control characters shown escaped: the message stays one line
        )


def claim_output_folder(folders: dict[Path, Path], case_path: Path, out: Path) -> Path:
    """The output folder ``out/<stem>`` of one case of a command, checked before anything runs
    (:func:`check_stem`, :func:`check_output_folder`) and recorded in ``folders`` (folder ->
    case file), so that no two cases of one command write into the same folder."""
    check_stem(case_path.stem, case_path)
    folder = out / case_path.stem
    if folder in folders:
        raise InputError(
            f"{folders[folder]} and {case_path} would both write into {folder}; "
            "give the case files different names (or run them with different --out)",
            "command line",
        )
    check_output_folder(folder)
    folders[folder] = case_path
    return folder


def check_output_folder(folder: Path) -> None:
    """Refuse, before anything runs, an output folder the outputs could not go into.

    ``folder`` is ``--out/<stem>``. A folder or its history that is a symbolic link is
    refused (never followed); so is a file where a folder should be, a folder where an
    output file should be, and a place that cannot be written.
    """
    out = folder.parent
    if out.exists() and not out.is_dir():
        raise InputError("--out is a file, not a folder; choose a folder", str(out))
    if folder.is_symlink():
        raise InputError(
            "the output folder is a symbolic link; outputs are written only inside --out, "
            "never through a link: remove the link or choose another --out",
            str(folder),
        )
    if folder.exists() and not folder.is_dir():
        raise InputError("a file is in the way where the output folder should be", str(folder))
    history = folder / HISTORY_NAME
    if history.is_symlink() or (history.exists() and not history.is_file()):
        raise InputError(
            "the history is a symbolic link or not a regular file; it is appended to, never "
            "followed: move it away (or replace it by the file it points to)",
            str(history),
        )
    for name in OUTPUT_NAMES:
        path = folder / name
        if path.is_dir() and not path.is_symlink():
            raise InputError("a folder is in the way of an output file", str(path))
    existing = next(p for p in (folder, *folder.parents) if p.exists())
    if not existing.is_dir():
        raise InputError("a file is in the way where a folder of --out should be", str(existing))
    if not os.access(existing, os.W_OK | os.X_OK):
        cause = "the file system is read-only" if _read_only(existing) else "permission denied"
        raise InputError(f"cannot write the outputs here: {cause}", str(existing))


def _read_only(path: Path) -> bool:
    try:
        return bool(os.statvfs(path).f_flag & os.ST_RDONLY)
    except OSError:
        return False


def write_all_atomic(files: dict[Path, str]) -> None:
    """Write several files as one set: every temporary first, then the renames together.

    A failure while writing the temporaries (disk full, permissions, an interrupt) removes
    them and leaves every earlier file as it was. Only the renames are left as a window:
    each ``os.replace`` is atomic, but a crash between two of them (microseconds, no
    Python code runs in between other than the loop) would leave some new files beside
    some old ones. ``os.replace`` replaces a symbolic link at the destination; it never
    writes through it. An operating-system fault becomes an InputError naming the file.
    """
    staged: list[tuple[str, Path]] = []
    current = None
    try:
        for path, text in files.items():
            current = path
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
            current = path
            os.replace(temporary, path)
    except BaseException as error:
        for temporary, _ in staged:
            Path(temporary).unlink(missing_ok=True)
        if isinstance(error, OSError) and current is not None:
            raise environment_error(error, current) from None
        raise


def dumps(data: dict) -> str:
    """budget.json text: strict JSON (no NaN or infinity), stable key order as built."""
    return json.dumps(data, indent=2, allow_nan=False, ensure_ascii=False) + "\n"
