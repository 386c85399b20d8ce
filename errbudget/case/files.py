"""Reading the files a case names: regular files only, within a size limit, never blocking.

Light on purpose (no numpy, no pint): the command line checks case files with it before
the rest of the package is loaded, so that a refusal comes back at once.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

from errbudget.errors import InputError


def _kind_of(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a plain file"


def _check_size(size: int, limit: int, what: str, source: str) -> None:
    if size > limit:
        most = f"{limit // 1024**2} MB" if limit % 1024**2 == 0 else f"{limit} bytes"
        raise InputError(
            f"{what} is {size / 1024**2:.1f} MB; files over {most} are refused "
            "(is it the right file?)",
            source,
        )


def _chunks(path: Path, limit: int, what: str):
    """The bytes of a regular file of at most ``limit`` bytes, in chunks, after the checks.

    A device, a named pipe or a socket is refused before it is opened (reading one may
    block forever or never end), and checked again on the open descriptor; at most
    ``limit + 1`` bytes are read even if the file grows meanwhile. Every fault is an
    InputError naming the file.
    """
    source = str(path)
    try:
        mode = os.stat(path).st_mode
        if not stat.S_ISREG(mode):
            raise InputError(
                f"{what} is not a regular file ({_kind_of(mode)}); give the path of a file",
                source,
            )
        handle = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:
        raise InputError(f"{what} not found", source) from None
    except OSError as error:
        raise InputError(f"{what} cannot be read ({error.strerror})", source) from None
    try:
        info = os.fstat(handle)
        if not stat.S_ISREG(info.st_mode):
            raise InputError(f"{what} is not a regular file ({_kind_of(info.st_mode)})", source)
        _check_size(info.st_size, limit, what, source)
        size = 0
        while size <= limit:
            chunk = os.read(handle, min(1 << 20, limit + 1 - size))
            if not chunk:
                break
            size += len(chunk)
            yield chunk
        _check_size(size, limit, what, source)  # the file may have grown since fstat
    except OSError as error:
        raise InputError(f"{what} cannot be read ({error.strerror})", source) from None
    finally:
        os.close(handle)


def read_regular_file(path: Path, limit: int, what: str) -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes, or an InputError naming it."""
    return b"".join(_chunks(path, limit, what))


def count_lines(path: Path, limit: int, what: str, most: int) -> int:
    """Line feeds in a regular file of at most ``limit`` bytes, read in chunks and never
    held whole; counting stops as soon as there are more than ``most``."""
    count = 0
    chunks = _chunks(path, limit, what)
    try:
        for chunk in chunks:
            count += chunk.count(b"\n")
            if count > most:
                break
    finally:
        chunks.close()
    return count
