"""Sizes, durations and walltimes as people write them: one parser each, one byte formatter.

The bottom layer of the house (with :mod:`snaplift.errors`): pure functions on strings and
numbers, importing nothing of snaplift but the errors. A value that cannot be read raises
:class:`ValueError` naming the value and what is expected; pydantic validators turn it into
a :class:`~snaplift.errors.ConfigError` naming the key, other callers add their key.

Byte units follow IEC 80000-13: ``kB``/``MB``/``GB``/``TB`` are powers of 1000,
``KiB``/``MiB``/``GiB``/``TiB`` powers of 1024.
"""

from __future__ import annotations

import os
import re

from snaplift.errors import ConfigError

__all__ = [
    "parse_bytes",
    "format_bytes",
    "size_label",
    "parse_duration",
    "parse_walltime",
    "parse_every",
    "usable_cores",
]

#: canonical spelling of each byte unit and its size (IEC 80000-13)
_BYTE_UNITS = {"B": 1, "kB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
               "KiB": 2**10, "MiB": 2**20, "GiB": 2**30, "TiB": 2**40}
#: what a user may write (lower case) -> canonical unit; a bare number is bytes
_BYTE_SPELLINGS = {**{unit.lower(): unit for unit in _BYTE_UNITS}, "": "B", "k": "kB", "m": "MB",
                   "g": "GB", "t": "TB"}
_DURATION = re.compile(r"(?:(\d+(?:\.\d+)?)h)?(?:(\d+(?:\.\d+)?)m(?:in)?)?(?:(\d+(?:\.\d+)?)s?)?")


def _split_size(value: str | int) -> tuple[str, str]:
    text = str(value).strip().lower().replace(" ", "")
    number = text.rstrip("abcdefghijklmnopqrstuvwxyz")
    unit = text[len(number):]
    try:
        amount = float(number)
    except ValueError:
        amount = -1.0
    if unit not in _BYTE_SPELLINGS or not amount > 0:
        raise ValueError(f"{value!r} is not a size; expected a number with a unit such as 512MB, 2GiB, 1.5TB")
    return number, _BYTE_SPELLINGS[unit]


def parse_bytes(value: str | int) -> int:
    """``'2GiB'`` -> 2147483648; ``'500MB'`` -> 500000000; positive integers pass through.

    Examples
    --------
    >>> parse_bytes("2GiB"), parse_bytes("500MB"), parse_bytes("1.5 kB"), parse_bytes(4096)
    (2147483648, 500000000, 1500, 4096)
    """
    if isinstance(value, int) and not isinstance(value, bool):
        if value <= 0:
            raise ValueError(f"a byte count must be positive, got {value}")
        return value
    number, unit = _split_size(value)
    return int(float(number) * _BYTE_UNITS[unit])


def size_label(value: str) -> str:
    """A size as written, in its canonical spelling: ``'500mb'`` -> ``'500MB'`` (names of files).

    >>> size_label(" 4 gib")
    '4GiB'
    """
    number, unit = _split_size(value)
    return f"{number}{unit}"


def format_bytes(size: float, unit: str | None = None) -> str:
    """A size for messages: ``1536 -> '1.5 KiB'`` (powers of 1024), or in a fixed ``unit``.

    Examples
    --------
    >>> format_bytes(1536), format_bytes(100), format_bytes(3 * 2**20, "MiB")
    ('1.5 KiB', '100 bytes', '3.0 MiB')
    """
    if unit is not None:
        return f"{size / _BYTE_UNITS[unit]:.1f} {unit}"
    value = float(size)
    for name in ("bytes", "KiB", "MiB", "GiB"):
        if value < 1024:
            return f"{int(value)} bytes" if name == "bytes" else f"{value:.1f} {name}"
        value /= 1024
    return f"{value:.1f} TiB"


def parse_duration(value: str | float | int) -> float:
    """``'55m'`` -> 3300.0 seconds; ``'1h30m'``, ``'5min'``, ``'90s'``; numbers are seconds.

    Examples
    --------
    >>> parse_duration("1h30m"), parse_duration("5min"), parse_duration("90"), parse_duration(12)
    (5400.0, 300.0, 90.0, 12.0)
    """
    if isinstance(value, int | float) and not isinstance(value, bool):
        if value <= 0:
            raise ValueError(f"a duration must be positive, got {value}")
        return float(value)
    text = str(value).strip().lower().replace(" ", "")
    parts = _DURATION.fullmatch(text)
    if not text or parts is None or not any(parts.groups()):
        raise ValueError(f"{value!r} is not a duration; expected e.g. 90s, 55m, 1h30m")
    hours, minutes, seconds = (float(p) if p else 0.0 for p in parts.groups())
    total = 3600 * hours + 60 * minutes + seconds
    if total <= 0:
        raise ValueError(f"a duration must be positive, got {value!r}")
    return total


def parse_walltime(value: str) -> float:
    """``'02:00:00'`` / ``'1-12:00:00'`` / ``'30:00'`` -> seconds (SLURM and PBS notation).

    >>> parse_walltime("1-00:30:00"), parse_walltime("45:00")
    (88200.0, 2700.0)
    """
    text = str(value).strip()
    days = 0
    if "-" in text:
        head, text = text.split("-", 1)
        days = int(head) if head.isdigit() else -1
    fields = text.split(":")
    if days < 0 or not 1 <= len(fields) <= 3 or not all(f.isdigit() for f in fields):
        raise ValueError(f"walltime {value!r} is not HH:MM:SS (or D-HH:MM:SS, MM:SS)")
    numbers = [int(f) for f in fields]
    while len(numbers) < 3:
        numbers.insert(0, 0)
    total = days * 86400 + numbers[0] * 3600 + numbers[1] * 60 + numbers[2]
    if total <= 0:
        raise ValueError(f"walltime {value!r} must be positive")
    return float(total)


def parse_every(value: int | float | str | None) -> tuple[int | None, float | None]:
    """``compress.checkpoint_every``: a number of tiles (``200``, ``"200 tiles"``) or a duration.

    Returns ``(tiles, seconds)`` with one of them set (both None for None).

    Example
    -------
    >>> parse_every("90s"), parse_every(50), parse_every("1h30m")
    ((None, 90.0), (50, None), (None, 5400.0))
    """
    if value is None:
        return None, None
    if isinstance(value, bool):
        raise ConfigError(f"compress.checkpoint_every = {value!r}: expected a number of tiles or a duration like 60s")
    if isinstance(value, int):
        if value < 1:
            raise ConfigError(f"compress.checkpoint_every = {value}: a number of tiles must be >= 1")
        return value, None
    text = str(value).strip().lower().replace(" ", "")
    tiles = re.fullmatch(r"(\d+)(tiles?)?", text)
    if tiles and int(tiles.group(1)) >= 1:
        return int(tiles.group(1)), None
    if not re.fullmatch(r"\d+(\.\d+)?", text):  # a bare number is a count of tiles, never seconds
        try:
            return None, parse_duration(text)
        except ValueError:
            pass
    raise ConfigError(
        f"compress.checkpoint_every = {value!r}: expected a number of tiles (e.g. 200) or a duration "
        "such as 60s, 5m, 1h"
    )


def usable_cores() -> int:
    """Cores this process may run on: its CPU affinity where the platform has one (a batch
    job or ``taskset`` may grant fewer than the machine has), else ``os.cpu_count()``."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)  # pragma: no cover - platforms without affinity
