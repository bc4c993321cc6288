"""check_times and snapshot_times: spacing, worst gap, tolerance in the stored precision."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.archive import check_times
from snaplift.errors import ArchiveError


def test_uniform_times():
    spacing = check_times(np.linspace(0.0, 2.0, 41))
    assert spacing.uniform and spacing.increasing
    assert spacing.dt == pytest.approx(0.05, rel=1e-12)  # (2 - 0) / 40, hand-computed
    assert spacing.n_times == 41


def test_one_bad_gap_is_named():
    times = 0.1 * np.arange(20)
    times[13:] += 0.1  # snapshot dropped between index 12 and 13: step 0.2 there
    spacing = check_times(times)
    assert not spacing.uniform
    assert spacing.worst_gap_index == 12
    assert spacing.worst_gap_value == pytest.approx(0.2, rel=1e-12)
    assert spacing.dt == pytest.approx(0.1, rel=1e-12)
    assert spacing.max_relative_deviation == pytest.approx(1.0, rel=1e-9)


def test_float32_rounding_far_from_zero_is_not_a_gap():
    # float32 times near 1e4 with step 0.01 carry ~1e-3 relative rounding in the step
    # (float32 spacing at 1e4 is 2**-10, IEEE 754): uniform within the stored precision
    times = (1.0e4 + 0.01 * np.arange(50)).astype(np.float32)
    assert check_times(times).uniform
    # the same numbers judged as float64 with no precision allowance are not uniform
    assert not check_times(times.astype(np.float64), atol=0.0).uniform
    # a real gap is still found in float32: each step carries at most one ulp of error
    # and 4 * eps * max|t| (about 5e-3 here) is well below a missing step of 0.01
    gapped = np.delete(times, 30)
    spacing = check_times(gapped)
    assert not spacing.uniform and spacing.worst_gap_index == 29


def test_repeated_time_is_not_uniform_nor_increasing():
    spacing = check_times([0.0, 1.0, 1.0, 2.0, 3.0])
    assert not spacing.uniform and not spacing.increasing
    assert spacing.worst_gap_index == 1


def test_too_few_or_bad_times():
    with pytest.raises(ArchiveError, match="at least 2"):
        check_times([1.0])
    with pytest.raises(ArchiveError, match="index 2"):
        check_times([0.0, 1.0, np.nan])
