"""One conformance suite for every fit method of the registry (snaplift.fit_methods).

Each test is parametrised over ``FIT_METHOD_NAMES``: a method added to the registry runs
all of them without a line here, and what a method says it needs (``uniform_steps``,
``single_run``, ``real_data``) decides which checks it must pass and which input it must
refuse.

The reference system is the handbook damped linear oscillator, two of them side by side:
``q'' + 2 zeta w q' + w^2 q = 0`` written as ``x' = A x`` with
``A = [[0, 1], [-w^2, -2 zeta w]]``, whose continuous eigenvalues are
``-zeta w +- i w sqrt(1 - zeta^2)`` (any vibrations handbook, e.g. Meirovitch,
"Fundamentals of Vibrations", 2001, ch. 2). It is sampled exactly: ``x(t) = expm(A t) x0``
(scipy.linalg.expm); the discrete eigenvalues are checked against scipy.linalg.eig of
``expm(A dt)`` and against the analytic ``exp(s dt)``.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from scipy.optimize import linear_sum_assignment

from snaplift.errors import ConfigError, FitError
from snaplift.fit_methods import FIT_METHOD_NAMES, FIT_METHODS, fit_methods_help, get_fit_method
from snaplift.fitting import FIT_METHODS as BOUND_METHODS
from snaplift.fitting import FitProblem, FitResult, run_fit
from snaplift.workflow.schema import parse_workflow

#: natural frequencies (rad/s) and damping ratios of the two oscillators
OMEGA, ZETA = (2.0, 5.0), (0.05, 0.1)
DT, SNAPSHOTS = 0.05, 80
#: eigenvalues of exact, noise-free samples: agreement to this (absolute) is rounding plus
#: the solvers' tolerances (common practice for well-conditioned 4 x 4 problems)
EIGEN_TOL = 1e-7
#: relative Frobenius error of the modal model on its own training data (exact samples)
RECONSTRUCTION_TOL = 1e-6


def _generator() -> np.ndarray:
    blocks = [np.array([[0.0, 1.0], [-w**2, -2.0 * z * w]]) for w, z in zip(OMEGA, ZETA, strict=True)]
    return scipy.linalg.block_diag(*blocks)


def _continuous_eigenvalues() -> np.ndarray:
    # handbook formula for the under-damped oscillator (module docstring)
    return np.array([-z * w + s * 1j * w * np.sqrt(1 - z**2)
                     for w, z in zip(OMEGA, ZETA, strict=True) for s in (1, -1)])


def _samples(times: np.ndarray, start: np.ndarray) -> np.ndarray:
    a = _generator()
    return np.column_stack([scipy.linalg.expm(a * t) @ start for t in times])


def _start(complex_valued: bool) -> np.ndarray:
    start = np.array([1.0, -0.3, 0.7, 0.4])
    return start + 1j * np.array([0.2, 0.5, -0.4, 0.1]) if complex_valued else start


def _reference_eigenvalues(dt: float = DT) -> np.ndarray:
    values = scipy.linalg.eig(scipy.linalg.expm(_generator() * dt), right=False)
    # the two references agree: scipy's eig of the propagator and the handbook exp(s dt)
    np.testing.assert_allclose(np.sort_complex(values), np.sort_complex(np.exp(_continuous_eigenvalues() * dt)),
                               atol=1e-12)
    return values


def _assert_same_eigenvalues(found: np.ndarray, expected: np.ndarray, tol: float = EIGEN_TOL) -> None:
    assert found.size == expected.size, (found, expected)
    cost = np.abs(found[:, None] - expected[None, :])
    rows, cols = linear_sum_assignment(cost)
    assert cost[rows, cols].max() < tol, (found, expected)


def _problem(data: np.ndarray, **options: object) -> FitProblem:
    return FitProblem(data, DT, holdout=0.2, seed=3, **options)  # type: ignore[arg-type]


def _unitary(complex_valued: bool, seed: int = 11) -> np.ndarray:
    rng = np.random.default_rng(seed)
    matrix = rng.standard_normal((4, 4)) + (1j * rng.standard_normal((4, 4)) if complex_valued else 0)
    q, _ = np.linalg.qr(matrix)
    return q


def test_registry_binds_every_method_once() -> None:
    # every name of the plain registry has exactly one fit, in the same order
    assert tuple(BOUND_METHODS) == FIT_METHOD_NAMES
    for name in FIT_METHOD_NAMES:
        assert BOUND_METHODS[name].info is FIT_METHODS[name]
        assert name in fit_methods_help() and FIT_METHODS[name].needs()


def test_unknown_method_is_a_one_line_config_error() -> None:
    with pytest.raises(ConfigError) as error:
        get_fit_method("svd")
    assert "\n" not in str(error.value) and all(name in str(error.value) for name in FIT_METHOD_NAMES)
    with pytest.raises(ConfigError):
        run_fit("svd", _problem(_samples(DT * np.arange(10), _start(False))))


def test_schema_choices_come_from_the_registry() -> None:
    for name in FIT_METHOD_NAMES:
        workflow = parse_workflow({"archive": {"path": "a.h5", "fields": ["u"], "step": 0.1},
                                   "fit": {"method": name},
                                   **({"lift": [{"kind": "monomials", "degree": 1}]}
                                      if FIT_METHODS[name].dictionary else {})})
        assert workflow.fit.method == name
    with pytest.raises(ConfigError) as error:
        parse_workflow({"archive": {"path": "a.h5", "fields": ["u"], "step": 0.1}, "fit": {"method": "svd"}})
    assert "\n" not in str(error.value)


@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
@pytest.mark.parametrize("method", FIT_METHOD_NAMES)
def test_method_recovers_the_oscillator_eigenvalues(method: str, complex_valued: bool) -> None:
    data = _samples(DT * np.arange(SNAPSHOTS), _start(complex_valued))
    if complex_valued and FIT_METHODS[method].real_data:
        with pytest.raises(FitError) as error:
            run_fit(method, _problem(data))
        assert "\n" not in str(error.value)
        return
    result = run_fit(method, _problem(data))
    assert isinstance(result, FitResult) and result.method == method
    _assert_same_eigenvalues(result.eigenvalue, _reference_eigenvalues())
    # spectrum properties from the analytic continuous eigenvalues (handbook formula)
    _assert_same_eigenvalues(result.rate, _continuous_eigenvalues(), tol=EIGEN_TOL / DT)
    expected = _continuous_eigenvalues()
    np.testing.assert_allclose(np.sort(np.abs(result.frequency)), np.sort(np.abs(expected.imag)) / (2 * np.pi),
                               atol=1e-6)
    np.testing.assert_allclose(np.sort(result.growth), np.sort(expected.real), atol=1e-6)
    # exact data: every eigenvalue is supported by the pairs (Colbrook & Townsend 2024)
    assert result.residual is not None and result.trusted is not None
    assert np.all(result.residual < 1e-6) and result.trusted.all()
    assert sorted(result.ranking().tolist()) == list(range(result.rank))
    # the modal model reproduces the training data (exact samples of a linear system)
    assert result.model.shape == data.shape
    assert result.relative_error() < RECONSTRUCTION_TOL
    assert result.run_amplitude.shape == (1, result.rank)


#: a real orthogonal change of basis for every method; a complex unitary one for the methods
#: that take complex data (the others refuse complex data: checked above)
BASIS_CHANGES = [pytest.param(name, complex_valued, id=f"{name}-{'unitary' if complex_valued else 'orthogonal'}")
                 for name in FIT_METHOD_NAMES for complex_valued in (False, True)
                 if not (complex_valued and FIT_METHODS[name].real_data)]


@pytest.mark.parametrize(("method", "complex_valued"), BASIS_CHANGES)
def test_method_is_invariant_to_a_unitary_change_of_basis(method: str, complex_valued: bool) -> None:
    data = _samples(DT * np.arange(SNAPSHOTS), _start(False))
    u = _unitary(complex_valued)
    plain, turned = run_fit(method, _problem(data)), run_fit(method, _problem(u @ data))
    # similar operators have the same eigenvalues (any linear algebra text)
    _assert_same_eigenvalues(turned.eigenvalue, plain.eigenvalue)
    # the modes turn with the basis: |<u m, m'>| = 1 for unit modes of matching eigenvalues
    cost = np.abs(turned.eigenvalue[:, None] - plain.eigenvalue[None, :])
    rows, cols = linear_sum_assignment(cost)
    overlap = np.abs(np.sum(np.conj(turned.modes[:, rows]) * (u @ plain.modes[:, cols]), axis=0))
    np.testing.assert_allclose(overlap, 1.0, atol=1e-6)
    assert turned.relative_error() < RECONSTRUCTION_TOL


@pytest.mark.parametrize("method", FIT_METHOD_NAMES)
def test_method_with_two_runs(method: str) -> None:
    first = _samples(DT * np.arange(40), _start(False))
    second = _samples(DT * np.arange(30), np.array([0.0, 1.0, -0.5, 0.8]))
    problem = _problem(np.hstack([first, second]), run_lengths=np.array([40, 30]))
    if FIT_METHODS[method].single_run:
        with pytest.raises((FitError, NotImplementedError)) as error:
            run_fit(method, problem)
        assert "\n" not in str(error.value)
        return
    result = run_fit(method, problem)
    _assert_same_eigenvalues(result.eigenvalue, _reference_eigenvalues())
    assert result.run_amplitude.shape == (2, result.rank)
    # each run is modelled from its own start: the joined model fits both
    assert result.relative_error() < RECONSTRUCTION_TOL


@pytest.mark.parametrize("method", [name for name in FIT_METHOD_NAMES if not FIT_METHODS[name].uniform_steps])
def test_method_for_any_time_steps_recovers_the_rates(method: str) -> None:
    times = np.sort(np.random.default_rng(5).uniform(0.0, 4.0, SNAPSHOTS))
    data = _samples(times, _start(False))
    result = run_fit(method, _problem(data, times=times))
    _assert_same_eigenvalues(result.rate, _continuous_eigenvalues(), tol=1e-6)
    assert result.relative_error() < RECONSTRUCTION_TOL


@pytest.mark.parametrize("options", [{"debias": "forward-backward"}, {"debias": "total-least-squares"},
                                     {"affine": True}], ids=["forward-backward", "tls", "affine"])
def test_dmd_variants_recover_the_eigenvalues(options: dict[str, object]) -> None:
    data = _samples(DT * np.arange(SNAPSHOTS), _start(False))
    offset = np.array([3.0, -1.0, 0.5, 2.0])
    if options.get("affine"):
        data = data + offset[:, None]  # x_{j+1} = F x_j + (I - F) c: an affine system with fixed point c
    result = run_fit("dmd", _problem(data, **options))
    _assert_same_eigenvalues(result.eigenvalue, _reference_eigenvalues())
    if options.get("affine"):
        # the fixed point solves (I - F) c = b (Hirsh et al. 2020)
        assert result.fixed_point is not None
        np.testing.assert_allclose(result.fixed_point, offset, atol=1e-6)
    assert result.relative_error() < RECONSTRUCTION_TOL
