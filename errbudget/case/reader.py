"""Reading one case file's tables: every error names the file and the key."""

from __future__ import annotations

import math
import os
import stat
from pathlib import Path

from errbudget.case.limits import MAX_MAGNITUDE
from errbudget.case.units import format_unit, parse_quantity
from errbudget.errors import InputError, did_you_mean


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


class CaseReader:
    """Reads one case file; every error names the file and the key."""

    def __init__(self, path: Path):
        self.path = path
        self.source = str(path)

    def fail(self, message: str, where: str | None = None) -> InputError:
        return InputError(message, self.source, where)

    def table(self, data: object, where: str, allowed: tuple[str, ...]) -> dict:
        if not isinstance(data, dict):
            raise self.fail(f"expected a table, got {type(data).__name__}", where)
        for key in data:
            if key not in allowed:
                raise self.fail(
                    f"unknown key {key!r}{did_you_mean(key, allowed)}; accepted: "
                    + ", ".join(allowed),
                    f"{where}.{key}" if where else key,
                )
        return data

    def required(self, data: dict, key: str, where: str):
        if key not in data:
            raise self.fail(f"missing required key {key!r}", f"{where}.{key}" if where else key)
        return data[key]

    def text(self, data: dict, key: str, where: str, default: str | None = None) -> str:
        value = data.get(key, default) if default is not None else self.required(data, key, where)
        if not isinstance(value, str) or not value.strip():
            raise self.fail(
                f"expected a non-empty string, got {value!r}", f"{where}.{key}" if where else key
            )
        return value

    def quantity(self, value: object, where: str, unit, meaning: str) -> float:
        try:
            parsed = parse_quantity(value, where)
            converted = float(parsed.to(unit).magnitude)
        except InputError as error:
            raise error.located(self.source, where) from None
        except Exception:  # pint's DimensionalityError and relatives
            raise self.fail(
                f"{value!r} has the wrong dimension for {meaning}: expected something "
                f'convertible to "{format_unit(unit)}"',
                where,
            ) from None
        self.magnitude(converted, f"{value!r}", where, unit)
        return converted

    def magnitude(self, value: float, given: str, where: str, unit=None) -> float:
        """Refuse a number beyond :data:`MAX_MAGNITUDE` (or not finite) in internal units."""
        label = f" {format_unit(unit)}" if unit is not None else ""
        if not math.isfinite(value) or abs(value) > MAX_MAGNITUDE:
            raise self.fail(
                f"{given} is {value:g}{label}, beyond the limit of {MAX_MAGNITUDE:g} in absolute "
                "value (a number this large is a typo or would overflow)",
                where,
            )
        return value

    def number(
        self,
        data: dict,
        key: str,
        where: str,
        default,
        low=None,
        high=None,
        integer=False,
        low_open=True,
        accepted="",
    ):
        value = data.get(key, default)
        full = f"{where}.{key}"
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or (integer and not isinstance(value, int))
        ):
            kind = "an integer" if integer else "a number"
            raise self.fail(f"expected {kind}, got {value!r}{accepted}", full)
        if not math.isfinite(value):
            raise self.fail(f"expected a finite number, got {value!r}", full)
        too_low = low is not None and (value <= low if low_open else value < low)
        if too_low or (high is not None and value > high):
            raise self.fail(f"{value!r} is out of range{accepted}", full)
        return value
