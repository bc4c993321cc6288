"""One parser per kind of quantity people write: sizes, durations, walltimes, checkpoint spacing."""

from __future__ import annotations

import os

import pytest

from snaplift.errors import ConfigError
from snaplift.units import (
    format_bytes,
    parse_bytes,
    parse_duration,
    parse_every,
    parse_walltime,
    size_label,
    usable_cores,
)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # IEC 80000-13: kB/MB/GB/TB are powers of 1000, KiB/MiB/GiB/TiB powers of 1024
        ("2GiB", 2 * 1024**3), ("500MB", 500 * 1000**2), ("1.5 kB", 1500), ("3 tib", 3 * 1024**4),
        ("64", 64), ("2g", 2 * 10**9), (4096, 4096),
    ],
)
def test_sizes(text, expected):
    assert parse_bytes(text) == expected


@pytest.mark.parametrize("bad", ["lots", "0MB", "-1GB", "2 parsecs", 0, ""])
def test_bad_sizes_say_what_is_expected(bad):
    with pytest.raises(ValueError, match="size|positive"):
        parse_bytes(bad)


def test_size_labels_are_canonical():
    # the demo names its archive after the size: '500mb' and '500 MB' are one file
    assert size_label("500mb") == size_label(" 500 MB") == "500MB"
    assert size_label("4gib") == "4GiB" and size_label("2kb") == "2kB"


def test_byte_formatting():
    # 1.5 KiB = 1536 bytes (IEC 80000-13)
    assert format_bytes(1536) == "1.5 KiB"
    assert format_bytes(1023) == "1023 bytes"
    assert format_bytes(5 * 1024**4) == "5.0 TiB"
    assert format_bytes(2048 * 1024**4) == "2048.0 TiB"
    assert format_bytes(3 * 2**20, "MiB") == "3.0 MiB"
    assert format_bytes(2**19, "MiB") == "0.5 MiB"


def test_durations_and_walltimes():
    # 1 h = 3600 s, 1 min = 60 s; SLURM walltime notation D-HH:MM:SS, MM:SS (sbatch --time)
    assert parse_duration("1h30m") == 5400.0 and parse_duration("5min") == 300.0
    assert parse_duration("90s") == parse_duration("90") == parse_duration(90) == 90.0
    assert parse_walltime("1-00:30:00") == 88200.0 and parse_walltime("45:00") == 2700.0
    for bad in ("soon", "0s", "", -3):
        with pytest.raises(ValueError):
            parse_duration(bad)
    with pytest.raises(ValueError):
        parse_walltime("2h")


def test_checkpoint_spacing_is_tiles_or_a_duration():
    assert parse_every(25) == (25, None) and parse_every("40 tiles") == (40, None)
    assert parse_every("5min") == (None, 300.0) and parse_every(None) == (None, None)
    for bad in (0, True, "2.5", "0", "often"):
        with pytest.raises(ConfigError, match="checkpoint_every"):
            parse_every(bad)


def test_cores_follow_the_affinity_mask():
    expected = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    assert usable_cores() == max(1, expected or 1)
