"""CF decoding shared by the HDF5/netCDF-4, zarr and series readers.

Rules (CF conventions 1.x, section 8.1 "Packed data" and section 2.5.1 "Missing data"):

- packed values are compared with ``_FillValue`` and ``missing_value`` *before*
  unpacking; matches become NaN;
- ``unpacked = packed * scale_factor + add_offset``, computed in float64 (complex128
  for complex data) whatever the packed type, since accumulation is always double;
- time units ``"<unit> since <origin>"`` (section 4.4) are *not* converted to dates:
  the numbers are returned as float64 counts of ``<unit>``, and the unit and origin are
  recorded in the variable's attrs as ``time_unit`` and ``time_origin``.

``valid_min``/``valid_max``/``valid_range`` are not applied (recorded in attrs only).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = [
    "Decoding",
    "decoding_from_attrs",
    "decode",
    "decoded_dtype",
    "parse_time_units",
    "TimeUnit",
    "time_unit_of",
    "SECONDS_PER_UNIT",
    "plain_attrs",
    "TIME_NAMES",
    "is_time_like",
]

#: dataset names taken as the snapshot time when no CF attribute says otherwise
TIME_NAMES = ("t", "time")

# attrs that only the storage library needs; they hold object references or internal
# bookkeeping that is neither picklable nor meaningful to a user
_INTERNAL_ATTRS = frozenset(
    {
        "DIMENSION_LIST",
        "REFERENCE_LIST",
        "CLASS",
        "NAME",
        "_Netcdf4Dimid",
        "_Netcdf4Coordinates",
        "_NCProperties",
        "_ARRAY_DIMENSIONS",
        "_nc3_strict",
    }
)

_TIME_UNITS = {
    "s": "seconds",
    "sec": "seconds",
    "secs": "seconds",
    "second": "seconds",
    "seconds": "seconds",
    "ms": "milliseconds",
    "millisecond": "milliseconds",
    "milliseconds": "milliseconds",
    "us": "microseconds",
    "microsecond": "microseconds",
    "microseconds": "microseconds",
    "min": "minutes",
    "mins": "minutes",
    "minute": "minutes",
    "minutes": "minutes",
    "h": "hours",
    "hr": "hours",
    "hrs": "hours",
    "hour": "hours",
    "hours": "hours",
    "d": "days",
    "day": "days",
    "days": "days",
    "ns": "nanoseconds",
    "nanosecond": "nanoseconds",
    "nanoseconds": "nanoseconds",
    "µs": "microseconds",  # micro sign U+00B5
    "μs": "microseconds",  # Greek small mu U+03BC, which keyboards and editors give as often
    # UDUNITS prefixes on "sec" (from memory: udunits2 accepts msec, usec, nsec)
    "msec": "milliseconds",
    "msecs": "milliseconds",
    "millisec": "milliseconds",
    "usec": "microseconds",
    "usecs": "microseconds",
    "microsec": "microseconds",
    "nsec": "nanoseconds",
    "nsecs": "nanoseconds",
}
#: seconds in one of each canonical time unit (SI; a day of 86400 s, as CF and UDUNITS count it)
SECONDS_PER_UNIT = {
    "seconds": 1.0,
    "milliseconds": 1e-3,
    "microseconds": 1e-6,
    "nanoseconds": 1e-9,
    "minutes": 60.0,
    "hours": 3600.0,
    "days": 86400.0,
}
_SINCE = re.compile(r"^\s*([A-Za-z]+)\s+since\s+(.+?)\s*$")


@dataclass(frozen=True)
class Decoding:
    """How to turn stored values into physical ones; the identity when all are unset."""

    scale_factor: float | None = None
    add_offset: float | None = None
    fill_values: tuple[Any, ...] = ()

    @property
    def is_identity(self) -> bool:
        return self.scale_factor is None and self.add_offset is None and not self.fill_values


def _plain(value: Any) -> Any:
    """A JSON/pickle-friendly python value, or None for values that are neither."""
    if isinstance(value, bytes | np.bytes_):
        return bytes(value).decode("utf-8", "replace")
    if isinstance(value, str | bool | int | float) or value is None:
        return value
    if isinstance(value, np.generic):
        if value.dtype.kind == "O" or value.dtype.kind == "V":
            return None
        return value.item()
    if isinstance(value, np.ndarray):
        if value.dtype.kind in "OV":
            return None
        items = [_plain(v) for v in value.ravel().tolist()]
        return items[0] if value.size == 1 else items
    if isinstance(value, list | tuple):
        items = [_plain(v) for v in value]
        return None if any(i is None for i in items) else items
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    return None


def plain_attrs(attrs: Any) -> dict[str, Any]:
    """Copy an attribute mapping into plain python values, dropping internal entries."""
    out: dict[str, Any] = {}
    for key in attrs.keys():
        if key in _INTERNAL_ATTRS:
            continue
        try:
            value = _plain(attrs[key])
        except Exception:  # unreadable attribute type: skip it, it cannot matter to us
            continue
        if value is not None:
            out[str(key)] = value
    return out


def _scalar(value: Any) -> Any:
    if isinstance(value, list):
        return value[0] if value else None
    return value


def decoding_from_attrs(attrs: dict[str, Any], stored_dtype: np.dtype) -> Decoding:
    """Read ``scale_factor``/``add_offset``/``_FillValue``/``missing_value`` from attrs."""
    scale = _scalar(attrs.get("scale_factor"))
    offset = _scalar(attrs.get("add_offset"))
    fills: list[Any] = []
    for key in ("_FillValue", "missing_value"):
        value = attrs.get(key)
        if value is None:
            continue
        for item in value if isinstance(value, list) else [value]:
            if isinstance(item, int | float | complex) and not isinstance(item, bool):
                fills.append(item)
    return Decoding(
        scale_factor=None if scale is None else float(scale),
        add_offset=None if offset is None else float(offset),
        fill_values=tuple(dict.fromkeys(fills)),
    )


def decoded_dtype(stored_dtype: np.dtype) -> np.dtype:
    """float64 for real data of any kind, complex128 for complex data."""
    return np.dtype(np.complex128 if np.dtype(stored_dtype).kind == "c" else np.float64)


def decode(raw: np.ndarray, decoding: Decoding) -> np.ndarray:
    """Apply CF unpacking to ``raw``; returns a new float64/complex128 array."""
    out = np.array(raw, dtype=decoded_dtype(raw.dtype), copy=True)
    if decoding.fill_values:
        missing = np.zeros(raw.shape, dtype=bool)
        for fill in decoding.fill_values:
            if isinstance(fill, float) and np.isnan(fill):
                missing |= np.isnan(raw) if raw.dtype.kind in "fc" else False
            elif raw.dtype.kind in "iu":
                # compare in the stored integer type: a float fill such as -32767.0
                # names the packed integer -32767 (CF 1.x section 2.5.1)
                if float(fill).is_integer():
                    missing |= raw == np.asarray(fill).astype(raw.dtype)
            else:
                # float fills are compared in the stored precision (a float32 file's
                # 9.96921e36 fill is not the same number in float64)
                missing |= raw == np.asarray(fill, dtype=raw.dtype)
    else:
        missing = None
    if decoding.scale_factor is not None:
        out *= decoding.scale_factor
    if decoding.add_offset is not None:
        out += decoding.add_offset
    if missing is not None and missing.any():
        out[missing] = np.nan
    return out


def parse_time_units(units: Any) -> tuple[str, str] | None:
    """``"hours since 2000-01-01"`` -> ``("hours", "2000-01-01")``; None otherwise."""
    if not isinstance(units, str):
        return None
    match = _SINCE.match(units)
    if match is None:
        return None
    unit = _TIME_UNITS.get(match.group(1).lower())
    if unit is None:
        return None
    return unit, match.group(2)


@dataclass(frozen=True)
class TimeUnit:
    """The time unit of an archive: ``name`` as found (``"milliseconds since 2020-01-01"``,
    ``"ms"``), ``canonical`` (``"milliseconds"``) and ``seconds`` per unit, both None when
    the unit does not convert to seconds (``"months since ..."``, ``"steps"``)."""

    name: str
    canonical: str | None
    seconds: float | None


def canonical_time_unit(text: Any) -> str | None:
    """``"ms"``, ``"Milliseconds"``, ``"ms since 2000-01-01"`` -> ``"milliseconds"``; None otherwise."""
    if not isinstance(text, str) or not text.strip():
        return None
    since = parse_time_units(text)
    if since is not None:
        return since[0]
    return _TIME_UNITS.get(text.strip().lower())


def time_unit_of(attrs: dict[str, Any]) -> TimeUnit | None:
    """The time unit a time variable declares, or None when it declares none.

    Looks at CF ``units`` (``"<unit> since <origin>"`` or a plain unit such as ``"s"``)
    and at a ``time_unit`` attribute (what an HDF5 / zarr file without CF conventions may
    carry; the readers also set it from a ``since`` unit). A declared unit that does not
    convert to seconds is kept by name with ``seconds=None``.
    """
    units = attrs.get("units")
    for text in (units, attrs.get("time_unit")):
        canonical = canonical_time_unit(text)
        if canonical is not None:
            return TimeUnit(str(text), canonical, SECONDS_PER_UNIT[canonical])
    for text in (units, attrs.get("time_unit")):
        if isinstance(text, str) and text.strip() and text.strip() != "1":
            return TimeUnit(text.strip(), None, None)
    return None


def is_time_like(name: str, attrs: dict[str, Any]) -> int:
    """How strongly a 1-D dataset looks like the snapshot time (0 = not at all).

    CF ``axis="T"`` or ``standard_name="time"`` beat ``units="... since ..."``, which
    beats a bare name ``t``/``time`` (the last path component).
    """
    if str(attrs.get("axis", "")).upper() == "T" or attrs.get("standard_name") == "time":
        return 3
    if parse_time_units(attrs.get("units")) is not None:
        return 2
    if name.rsplit("/", 1)[-1].lower() in TIME_NAMES:
        return 1
    return 0
