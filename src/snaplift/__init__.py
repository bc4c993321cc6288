"""snaplift: stream simulation archives into modes, spectra and linear surrogates."""

from __future__ import annotations

__version__ = "0.1.0"
__all__ = ["__version__"]
