"""Spectrum properties shared by the fit records that have ``eigenvalue`` and ``dt``."""

from __future__ import annotations

import numpy as np

from snaplift.fitting import spectrum


class SpectrumProperties:
    """Rate, frequency, growth, period and conjugate partner from ``eigenvalue`` and ``dt``."""

    eigenvalue: np.ndarray
    dt: float

    @property
    def rate(self) -> np.ndarray:
        """``log(eigenvalue) / dt`` (complex, 1/s)."""
        return spectrum.continuous_rate(self.eigenvalue, self.dt)

    @property
    def frequency(self) -> np.ndarray:
        """Signed frequency in Hz."""
        return spectrum.frequency(self.eigenvalue, self.dt)

    @property
    def growth(self) -> np.ndarray:
        """Growth rate in 1/s."""
        return spectrum.growth(self.eigenvalue, self.dt)

    @property
    def period(self) -> np.ndarray:
        """Period in s (``inf`` for non-oscillating modes)."""
        return spectrum.period(self.eigenvalue, self.dt)

    @property
    def partner(self) -> np.ndarray:
        """Index of the conjugate partner of each mode, -1 if none."""
        return spectrum.conjugate_pairs(self.eigenvalue)


def freeze_arrays(record: object) -> None:
    """Make every ndarray attribute of a dataclass record read-only."""
    from dataclasses import fields

    for item in fields(record):  # type: ignore[arg-type]
        value = getattr(record, item.name)
        if isinstance(value, np.ndarray):
            value.setflags(write=False)
