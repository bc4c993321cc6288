"""Delays (Hankel stacking) reveal frequencies a single probe cannot show on its own."""

from __future__ import annotations

import numpy as np

from snaplift.fitting import fit_dmd, run_pair_mask
from snaplift.lifting import delayed_run_lengths, hankel

F1, F2, DT = 1.0, np.sqrt(2.0), 0.05  # Hz, Hz (incommensurate), s: invented probe


def _probe(t: np.ndarray, phase: float = 0.3) -> np.ndarray:
    return (np.cos(2 * np.pi * F1 * t) + 0.6 * np.cos(2 * np.pi * F2 * t + phase))[None, :]


def test_two_frequencies_need_delays():
    signal = _probe(DT * np.arange(400))
    plain = fit_dmd(signal, DT)
    # One probe gives a 1 x m snapshot matrix: DMD has one eigenvalue, real for real data,
    # so no frequency at all (rank argument; Arbabi & Mezic 2017, SIAM J. Appl. Dyn. Syst.
    # 16(4), sec. 5, motivate Hankel DMD with exactly this case).
    assert plain.eigenvalue.size == 1 and abs(plain.frequency[0]) < 1e-12
    delayed = fit_dmd(hankel(signal, count=8), DT, rank=4)
    found = np.sort(np.abs(delayed.frequency))
    # A sum of two sinusoids obeys a linear recurrence of order 4 (characteristic roots
    # exp(+-2 pi i f dt)), so four delays suffice: both frequencies exact.
    np.testing.assert_allclose(found, [F1, F1, F2, F2], rtol=1e-8)
    np.testing.assert_allclose(delayed.growth, 0.0, atol=1e-8)


def test_delay_windows_do_not_cross_runs():
    lengths = [150, 120]
    t = DT * np.arange(max(lengths))
    joined = np.hstack([_probe(t[: lengths[0]], 0.3), _probe(t[: lengths[1]], 2.0)])
    lifted = hankel(joined, count=8, spacing=2, run_lengths=lengths)
    mask = run_pair_mask(delayed_run_lengths(lengths, count=8, spacing=2))
    fit = fit_dmd(lifted, DT, rank=4, pair_mask=mask)
    # A window across the jump in phase would break the recurrence and bias the fit.
    np.testing.assert_allclose(np.sort(np.abs(fit.frequency)), [F1, F1, F2, F2], rtol=1e-8)


def test_windows_across_a_run_boundary_spoil_the_fit():
    # Counter-check of the test above: ignoring the boundary mixes two phases in a window.
    lengths = [150, 120]
    t = DT * np.arange(max(lengths))
    joined = np.hstack([_probe(t[: lengths[0]], 0.3), _probe(t[: lengths[1]], 2.0)])
    careless = fit_dmd(hankel(joined, count=8, spacing=2), DT, rank=4)
    error = np.abs(np.sort(np.abs(careless.frequency)) - [F1, F1, F2, F2]).max()
    assert error > 1e-6
