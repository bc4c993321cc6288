"""DMD on coefficient matrices: exactness on linear data, affine term, runs, heat equation."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import FitError, SnapliftError
from snaplift.fitting import DMDFit, fit_dmd, normalize_modes, run_pair_mask

DT = 0.1


def test_linear_system_eigenvalues_are_exact(real_system, trajectory, match_error):
    operator, truth = real_system()
    start = np.random.default_rng(1).standard_normal(operator.shape[0])
    fit = fit_dmd(trajectory(operator, start, 40), DT)
    assert fit.rank == truth.size
    # Tu et al. 2014, Thm. 1: with linearly consistent data, DMD eigenvalues are those of A.
    assert match_error(fit.eigenvalue, truth) < 1e-10


def test_exact_modes_are_eigenvectors_of_the_operator(real_system, trajectory):
    operator, _ = real_system()
    start = np.random.default_rng(2).standard_normal(operator.shape[0])
    for mode_type in ("exact", "projected"):
        fit = fit_dmd(trajectory(operator, start, 30), DT, mode_type=mode_type)
        residual = operator @ fit.modes - fit.modes * fit.eigenvalue[None, :]
        # Tu et al. 2014, Thm. 1: exact DMD modes are eigenvectors of A = Y X^+; with a
        # full-rank X pair matrix the projected modes (Schmid 2010) coincide.
        assert np.abs(residual).max() < 1e-10, mode_type


def test_complex_data_uses_conjugate_transposes(match_error):
    rng = np.random.default_rng(3)
    truth = np.array([0.9 * np.exp(0.4j), 0.7 * np.exp(-2.0j), 0.5 + 0.3j, 0.99j])
    vectors = rng.standard_normal((4, 4)) + 1j * rng.standard_normal((4, 4))
    operator = vectors @ np.diag(truth) @ np.linalg.inv(vectors)
    states = np.empty((4, 25), dtype=complex)
    states[:, 0] = rng.standard_normal(4) + 1j * rng.standard_normal(4)
    for j in range(1, 25):
        states[:, j] = operator @ states[:, j - 1]
    fit = fit_dmd(states, DT)
    # Tu et al. 2014, Thm. 1 (holds for complex A; a missing conjugate would break it).
    assert match_error(fit.eigenvalue, truth) < 1e-10


def test_affine_fit_of_centred_data_is_exact_and_plain_fit_is_biased(
    real_system, trajectory, match_error
):
    operator, truth = real_system(seed=4)
    rng = np.random.default_rng(5)
    states = trajectory(operator, rng.standard_normal(operator.shape[0]), 40)
    shifted = states + 5.0 * rng.standard_normal(operator.shape[0])[:, None]
    centred = shifted - shifted.mean(axis=1, keepdims=True)

    affine = fit_dmd(centred, DT, affine=True)
    plain = fit_dmd(centred, DT)
    affine_error = match_error(affine.eigenvalue, truth)
    plain_error = match_error(plain.eigenvalue, truth)
    # Hirsh, Harris, Kutz & Brunton 2020: the affine term keeps the eigenvalues exact.
    assert affine_error < 1e-8
    # Chen, Tu & Rowley 2012: mean subtraction without an affine term biases the eigenvalues.
    assert plain_error > 1e-4
    assert plain_error > 1e6 * max(affine_error, 1e-15)
    assert affine.affine and affine.offset is not None and affine.fixed_point is not None
    # x_{j+1} - mean = A (x_j - mean) + (A - I) mean, so the fixed point is -mean (from the
    # centring) when centred: c = (I - A)^-1 b = -(states mean).
    np.testing.assert_allclose(affine.fixed_point, -states.mean(axis=1), atol=1e-9)
    assert plain.offset is None and plain.fixed_point is None


def test_affine_fit_of_uncentred_affine_system(real_system, match_error):
    operator, truth = real_system(seed=6)
    rng = np.random.default_rng(7)
    offset = rng.standard_normal(operator.shape[0])
    states = np.empty((operator.shape[0], 30))
    states[:, 0] = rng.standard_normal(operator.shape[0])
    for j in range(1, 30):
        states[:, j] = operator @ states[:, j - 1] + offset
    fit = fit_dmd(states, DT, affine=True)
    # Hirsh et al. 2020: x_{j+1} = A x_j + b is recovered exactly, eigenvalues and b.
    assert match_error(fit.eigenvalue, truth) < 1e-8
    np.testing.assert_allclose(fit.offset, offset, atol=1e-9)


def test_centred_square_data_gives_roots_of_unity():
    # Chen, Tu & Rowley 2012, sec. 4: DMD of mean-subtracted, linearly independent
    # snapshots x_0..x_{m-1} gives the m-th roots of unity other than 1 (the DFT).
    m = 10
    snapshots = np.random.default_rng(8).standard_normal((50, m))
    centred = snapshots - snapshots.mean(axis=1, keepdims=True)
    fit = fit_dmd(centred, DT)
    roots = np.exp(2j * np.pi * np.arange(1, m) / m)
    assert np.sort(np.angle(fit.eigenvalue)) == pytest.approx(np.sort(np.angle(roots)), abs=1e-10)
    assert np.abs(fit.eigenvalue) == pytest.approx(np.ones(m - 1), abs=1e-10)


def test_heat_equation_decay_rates():
    # Separation of variables for u_t = nu u_xx, u(0) = u(L) = 0 (Haberman, "Applied
    # Partial Differential Equations", ch. 2): u = sum_k a_k sin(k pi x / L) exp(-nu (k pi/L)^2 t).
    nu, length, dt, n_points, n_snapshots = 0.01, 1.0, 0.5, 64, 30
    wavenumbers = np.array([1, 2, 3])
    weights = np.array([1.0, -0.6, 0.3])
    x = np.linspace(0.0, length, n_points + 2)[1:-1]
    t = dt * np.arange(n_snapshots)
    decay = nu * (wavenumbers * np.pi / length) ** 2
    field = np.sin(np.outer(x, wavenumbers) * np.pi / length) @ (
        weights[:, None] * np.exp(-decay[:, None] * t[None, :])
    )
    basis, singular, _ = np.linalg.svd(field, full_matrices=False)
    coefficients = basis[:, :3].conj().T @ field  # C = U^H X, as the compression stage gives
    fit = fit_dmd(coefficients, dt)
    expected = np.sort(np.exp(-decay * dt))
    got = np.sort(fit.eigenvalue.real)
    assert np.abs(fit.eigenvalue.imag).max() < 1e-12
    np.testing.assert_allclose(got, expected, rtol=1e-8)  # Haberman, ch. 2 (see above)
    # rank=None finds the numerical rank 3 also in a basis with 10 directions, 7 of them noise.
    wide = fit_dmd(basis[:, :10].conj().T @ field, dt)
    assert wide.rank == 3
    np.testing.assert_allclose(np.sort(wide.eigenvalue.real), expected, rtol=1e-8)
    np.testing.assert_allclose(np.sort(wide.growth), np.sort(-decay), rtol=1e-8)


def test_runs_separated_by_pair_mask(real_system, trajectory, match_error):
    operator, truth = real_system(seed=9)
    rng = np.random.default_rng(10)
    first = trajectory(operator, rng.standard_normal(operator.shape[0]), 25)
    second = trajectory(operator, rng.standard_normal(operator.shape[0]), 20)
    joined = np.hstack([first, second])
    mask = run_pair_mask([25, 20])
    assert mask.sum() == 1 and mask[24]
    masked = fit_dmd(joined, DT, pair_mask=mask)
    unmasked = fit_dmd(joined, DT)
    # Tu et al. 2014: exact when every pair obeys x_{j+1} = A x_j; the boundary pair does not.
    assert match_error(masked.eigenvalue, truth) < 1e-10
    assert match_error(unmasked.eigenvalue, truth) > 1e-4
    assert masked.n_pairs == 43 and unmasked.n_pairs == 44
    assert masked.amplitude_snapshots == 25


def test_second_truncation(real_system, trajectory):
    operator, _ = real_system(seed=11)
    states = trajectory(operator, np.random.default_rng(12).standard_normal(6), 40)
    fit = fit_dmd(states, DT, rank=2)
    assert fit.rank == 2 and fit.eigenvalue.shape == (2,)
    assert fit.modes.shape == (6, 2) and fit.operator.shape == (2, 2)
    assert fit.operator_basis.shape == (6, 2)
    # common practice: orthonormal truncation basis, reduced operator = Q^H A_exact Q
    np.testing.assert_allclose(fit.operator_basis.T @ fit.operator_basis, np.eye(2), atol=1e-12)
    np.testing.assert_allclose(
        np.sort_complex(np.linalg.eigvals(fit.operator)),
        np.sort_complex(fit.eigenvalue),
        atol=1e-12,
    )
    energy = np.cumsum(fit.pair_singular_value**2) / np.sum(fit.pair_singular_value**2)
    by_energy = fit_dmd(states, DT, rank=0.9)
    assert (
        by_energy.rank == int(np.argmax(energy >= 0.9)) + 1
    )  # hand rule: smallest r reaching 90 %
    by_basis = fit_dmd(states, DT, rank=0.6, singular_values=[4.0, 3.0, 2.0, 1.0, 1.0, 1.0])
    assert by_basis.rank == 2  # hand computation: 16 < 0.6 * 32 = 19.2 <= 16 + 9


def test_determinism_and_phase_normalisation(real_system, trajectory):
    operator, _ = real_system(seed=13)
    states = trajectory(operator, np.random.default_rng(14).standard_normal(6), 30)
    one, two = fit_dmd(states, DT), fit_dmd(states.copy(), DT)
    for name in ("eigenvalue", "modes", "amplitude", "operator"):
        assert np.array_equal(getattr(one, name), getattr(two, name)), name
    # common practice (scikit-learn svd_flip idea): unit norm, largest entry real positive
    np.testing.assert_allclose(np.linalg.norm(one.modes, axis=0), 1.0, rtol=1e-12)
    pivots = one.modes[np.argmax(np.abs(one.modes), axis=0), np.arange(one.rank)]
    assert np.all(pivots.imag == 0) and np.all(pivots.real > 0)
    # A global phase on the data must not change the modes, only rotate the amplitudes.
    turn = np.exp(0.7j)
    rotated = fit_dmd(turn * states, DT)
    np.testing.assert_allclose(rotated.eigenvalue, one.eigenvalue, atol=1e-12)
    np.testing.assert_allclose(rotated.modes, one.modes, atol=1e-10)
    np.testing.assert_allclose(rotated.amplitude, turn * one.amplitude, atol=1e-10)
    # sorted by |amplitude|, conjugate pairs listed +f then -f
    magnitude = np.abs(one.amplitude)
    assert np.all(np.diff(magnitude) <= 1e-9 * magnitude.max())
    partner = one.partner
    first_of_pair = np.flatnonzero(partner > np.arange(partner.size))
    assert first_of_pair.size == 2
    for i in first_of_pair:
        assert one.frequency[i] > 0 and partner[i] == i + 1


def test_fit_is_read_only(real_system, trajectory):
    operator, _ = real_system()
    fit = fit_dmd(trajectory(operator, np.ones(6), 20), DT)
    assert isinstance(fit, DMDFit)
    with pytest.raises(ValueError):
        fit.eigenvalue[0] = 0.0
    with pytest.raises(AttributeError):
        fit.dt = 1.0  # type: ignore[misc]


def test_normalize_modes_keeps_zero_columns():
    got = normalize_modes(np.array([[0.0, 3.0], [0.0, -4j]]))
    np.testing.assert_allclose(
        got, [[0.0, 0.6j], [0.0, 0.8]], atol=1e-15
    )  # hand: 3 * conj(-4j) / (4 * 5)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"coefficients": np.ones((3, 1))}, "at least 1 snapshot pair"),
        ({"coefficients": np.ones((3, 2)), "affine": True}, "at least 2 snapshot pair"),
        ({"coefficients": np.ones(5)}, "2-D array"),
        ({"coefficients": np.ones((3, 4)), "dt": 0.0}, "dt must be a positive"),
        ({"coefficients": np.ones((3, 4)), "dt": "1"}, "dt must be a positive"),
        ({"coefficients": np.ones((3, 4)), "rank": 2}, "rank 2 is not available"),
        ({"coefficients": np.ones((3, 4)), "rank": 1.5}, "energy fraction"),
        ({"coefficients": np.ones((3, 4)), "rank": "best"}, "rank must be"),
        ({"coefficients": np.ones((3, 4)), "rank": True}, "rank must be"),
        ({"coefficients": np.zeros((3, 4))}, "pair matrix is zero"),
        ({"coefficients": np.ones((3, 4)), "pair_mask": np.ones(2, bool)}, r"shape \(3,\)"),
        ({"coefficients": np.ones((3, 4)), "pair_mask": np.ones(3)}, "boolean"),
        ({"coefficients": np.ones((3, 4)), "pair_mask": np.ones(3, bool)}, "0 usable pairs"),
        ({"coefficients": np.ones((3, 4)), "mode_type": "fast"}, "mode_type"),
        ({"coefficients": np.ones((3, 4)), "singular_values": [1.0]}, "length 3"),
        (
            {"coefficients": np.eye(3, 4), "rank": "optimal", "singular_values": [1.0, 1, 1]},
            "shape of the original data",
        ),
    ],
)
def test_bad_input_is_a_clear_fit_error(kwargs, message):
    kwargs.setdefault("dt", DT)
    with pytest.raises(FitError, match=message):
        fit_dmd(**kwargs)


def test_non_finite_input_names_the_entry():
    data = np.ones((3, 5))
    data[2, 3] = np.nan
    with pytest.raises(FitError, match=r"coefficients\[2, 3\] is nan") as info:
        fit_dmd(data, DT)
    assert isinstance(info.value, SnapliftError)


def test_run_pair_mask_rejects_bad_lengths():
    with pytest.raises(FitError, match=r"run_lengths\[1\] is 0"):
        run_pair_mask([3, 0])
    np.testing.assert_array_equal(run_pair_mask([2, 1, 2]), [False, True, True, False])
