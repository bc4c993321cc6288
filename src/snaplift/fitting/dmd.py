"""Dynamic mode decomposition of the reduced coefficients ``C = U^H X``.

Orientation convention (the one used everywhere in :mod:`snaplift.fitting`): snapshots
are columns, operators act on column vectors from the left, ``x_{j+1} ~= A x_j``. The
reduced operator is ``A_tilde = Q^H A Q`` with ``Q = operator_basis`` (r x k, orthonormal
columns), so ``z_{j+1} ~= A_tilde z_j`` for ``z = Q^H x``; ``operator[i, l]`` is the
contribution of input coordinate ``l`` to output coordinate ``i``.
"""

from __future__ import annotations

import numbers
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting import spectrum
from snaplift.fitting._checks import finite_vector, pair_keep, positive_step, run_lengths_array, snapshot_matrix
from snaplift.fitting._spectral import SpectrumProperties, freeze_arrays
from snaplift.fitting.amplitudes import optimal_amplitudes
from snaplift.fitting.debias import DEBIAS_METHODS, Debias, debiased_operator
from snaplift.fitting.rank import choose_rank

__all__ = ["DMDFit", "fit_dmd", "normalize_modes", "run_pair_mask"]

ModeType = Literal["exact", "projected"]

#: eigenvalues with |lambda| below this fraction of the spectral radius get projected modes
ZERO_EIGENVALUE = 1e-10
#: near-ties within this relative margin pick the first index as the phase reference
PHASE_TIE = 1e-10


@dataclass(frozen=True, eq=False)
class DMDFit(SpectrumProperties):
    """A DMD fit in coefficient space (arrays are read-only).

    Attributes
    ----------
    eigenvalue : ndarray, shape (k,), complex128
        Discrete-time eigenvalues (per step ``dt``) of the fitted operator.
    modes : ndarray, shape (r, k), complex128
        DMD modes in coefficient space; the physical modes are ``U @ modes``. Unit norm,
        largest-magnitude entry real and positive (see :func:`normalize_modes`).
    amplitude : ndarray, shape (k,), complex128
        Optimal amplitudes (Jovanovic et al. 2014) for snapshots
        ``0 .. amplitude_snapshots-1`` (the first run): ``x_j ~= fixed_point +
        modes @ (amplitude * eigenvalue**j)``.
    operator : ndarray, shape (k, k)
        Reduced operator ``Q^H A Q`` on the coordinates of ``operator_basis`` (module
        docstring: column vectors, ``z_{j+1} = operator @ z_j``). Real for real data.
    operator_basis : ndarray, shape (r, k)
        ``Q``: leading left singular vectors of the (centred, if affine) X pair matrix.
    dt : float
        Time between snapshots.
    rank : int
        ``k``, the rank of the second truncation.
    offset : ndarray, shape (r,), or None
        Affine term ``b`` in ``x_{j+1} = A x_j + b``; None without ``affine``.
    fixed_point : ndarray, shape (r,), or None
        Least-squares solution ``c`` of ``(I - A) c = b`` (the constant the affine model
        adds to the modal sum); None without ``affine``.
    pair_singular_value : ndarray, shape (min(r, pairs),)
        All singular values of the (centred) X pair matrix, for rank diagnostics.
    n_pairs : int
        Pairs used in the fit (after ``pair_mask``).
    amplitude_snapshots : int
        Number of leading snapshots the amplitudes were fitted to.
    mode_type : {"exact", "projected"}
        Exact (Tu et al. 2014) or projected (Schmid 2010) modes.
    """

    eigenvalue: np.ndarray
    modes: np.ndarray
    amplitude: np.ndarray
    operator: np.ndarray
    operator_basis: np.ndarray
    dt: float
    rank: int
    offset: np.ndarray | None
    fixed_point: np.ndarray | None
    pair_singular_value: np.ndarray
    n_pairs: int
    amplitude_snapshots: int
    mode_type: str

    def __post_init__(self) -> None:
        freeze_arrays(self)

    @property
    def affine(self) -> bool:
        return self.offset is not None


def fit_dmd(
    coefficients: ArrayLike,
    dt: float,
    *,
    rank: int | float | Literal["optimal"] | None = None,
    affine: bool = False,
    pair_mask: ArrayLike | None = None,
    singular_values: ArrayLike | None = None,
    mode_type: ModeType = "exact",
    debias: Debias = "none",
) -> DMDFit:
    """Fit DMD to the snapshot pairs ``(C[:, j], C[:, j + 1])`` of a coefficient matrix.

    With ``X``, ``Y`` the pair matrices, the SVD ``X = W S V^H`` truncated to rank k
    gives ``A_tilde = W_k^H Y V_k S_k^{-1}``, its eigenvalues ``lambda`` and eigenvectors
    ``w``, and modes ``Y V_k S_k^{-1} w`` (exact, Tu et al. 2014) or ``W_k w``
    (projected, Schmid 2010). Exact modes of eigenvalues with
    ``|lambda| <= 1e-10 * max|lambda|`` are replaced by projected ones, because the exact
    formula divides by lambda (Tu et al. 2014, sec. 3).

    ``affine=True`` fits ``x_{j+1} = A x_j + b`` (Hirsh, Harris, Kutz & Brunton 2020):
    the least squares with a row of ones appended to ``X``,
    ``[A b] = Y [X; 1]^+``, is solved by eliminating ``b`` exactly: ``b = ybar - A xbar``
    with ``xbar``, ``ybar`` the means of the X and Y pair columns, and ``A`` the DMD of the
    pair matrices centred by those means. The augmented operator ``[[A, b], [0, 1]]`` has
    the eigenvalues of ``A`` plus the eigenvalue 1 that belongs to the constant (its left
    eigenvector is the last unit vector, so it is identified by the block-triangular
    structure rather than by its value); only ``A`` is decomposed, so that eigenvalue
    never appears and an eigenvalue of ``A`` near 1 cannot be confused with it.
    Use it whenever the data were centred: without the affine term, subtracting the
    temporal mean biases DMD toward the temporal DFT of the data, whose "eigenvalues" are
    roots of unity set by the record length (Chen, Tu & Rowley 2012).

    Parameters
    ----------
    coefficients : array_like, shape (r, m)
        Reduced coefficients ``U^H X``, one column per snapshot, real or complex.
    dt : float
        Time between consecutive snapshots.
    rank : int, float, "optimal" or None
        Second truncation of the X pair matrix: an int keeps that many singular values;
        a float in (0, 1) is an energy fraction; ``"optimal"`` the hard threshold of
        Gavish & Donoho (2014) on the pair matrix; None keeps the numerical rank
        (singular values above ``s_max * max(shape) * eps``, numpy's ``matrix_rank``).
    affine : bool
        Fit an affine term (see above).
    pair_mask : array_like of bool, shape (m - 1,), optional
        ``True`` removes pair ``j -> j+1``, e.g. where a run ends and the next begins
        (see :func:`run_pair_mask`). Amplitudes are fitted to the snapshots before the
        first removed pair.
    singular_values : array_like, shape (r,), optional
        Singular values of the basis from the compression stage. When given, an energy
        fraction ``rank`` is applied to them instead of to the pair matrix.
    mode_type : {"exact", "projected"}
        Which modes to return.
    debias : {"none", "forward-backward", "total-least-squares"}
        Noise-robust reduced operator (:mod:`snaplift.fitting.debias`; Dawson et al.
        2016, Hemati et al. 2017) in place of the least-squares one. The modes are then
        the projected ones ``W_k w`` and the result says ``mode_type="projected"``: the
        exact-mode formula belongs to the least-squares operator.

    Returns
    -------
    DMDFit
        Modes ordered by ``|amplitude|`` descending (ties: frequency, then growth).

    Raises
    ------
    FitError
        Non-finite data, bad ``dt``, too few pairs, rank not available.

    References
    ----------
    Schmid, P. J. (2010), "Dynamic mode decomposition of numerical and experimental
    data", J. Fluid Mech. 656, 5-28.
    Tu, J. H., Rowley, C. W., Luchtenburg, D. M., Brunton, S. L. & Kutz, J. N. (2014),
    "On dynamic mode decomposition: theory and applications", J. Comput. Dyn. 1(2).
    Chen, K. K., Tu, J. H. & Rowley, C. W. (2012), "Variants of dynamic mode
    decomposition: boundary condition, Koopman, and Fourier analyses", J. Nonlinear Sci. 22.
    Hirsh, S. M., Harris, K. D., Kutz, J. N. & Brunton, B. W. (2020), "Centering data
    improves the dynamic mode decomposition", SIAM J. Appl. Dyn. Syst. 19(3).
    Jovanovic, M. R., Schmid, P. J. & Nichols, J. W. (2014), Phys. Fluids 26, 024103.
    Dawson, S. T. M., Hemati, M. S., Williams, M. O. & Rowley, C. W. (2016), Exp. Fluids 57, 42.
    Hemati, M. S., Rowley, C. W., Deem, E. A. & Cattafesta, L. N. (2017), Theor. Comput.
    Fluid Dyn. 31, 349-368.

    Examples
    --------
    >>> c = np.array([[1.0, 0.5, 0.25, 0.125], [1.0, -0.9, 0.81, -0.729]])
    >>> fit = fit_dmd(c, dt=0.1)
    >>> np.round(np.sort(fit.eigenvalue.real), 12)
    array([-0.9,  0.5])
    """
    data = snapshot_matrix(coefficients, "coefficients")
    step = positive_step(dt)
    if mode_type not in ("exact", "projected"):
        raise FitError(f"mode_type must be 'exact' or 'projected'; got {mode_type!r}")
    if not isinstance(affine, (bool, np.bool_)):
        raise FitError(f"affine must be True or False; got {affine!r}")
    if debias not in DEBIAS_METHODS:
        raise FitError(f"debias must be one of {', '.join(DEBIAS_METHODS)}; got {debias!r}")
    n_state, n_snapshots = data.shape
    keep = pair_keep(pair_mask, n_snapshots)
    used = np.flatnonzero(keep)
    needed = 2 if affine else 1
    if used.size < needed:
        raise FitError(
            f"fit_dmd needs at least {needed} snapshot pair(s)"
            f"{' for affine=True' if affine else ''}; "
            f"got {n_snapshots} snapshots and {used.size} usable pairs after pair_mask"
        )
    x_pairs, y_pairs = data[:, used], data[:, used + 1]
    offset_terms: tuple[np.ndarray, np.ndarray] | None = None
    if affine:
        x_mean, y_mean = x_pairs.mean(axis=1), y_pairs.mean(axis=1)
        x_pairs, y_pairs = x_pairs - x_mean[:, None], y_pairs - y_mean[:, None]
        offset_terms = (x_mean, y_mean)

    left, sigma, right = _thin_svd(x_pairs)
    basis_values = None if singular_values is None else _basis_values(singular_values, n_state)
    k = _truncation(rank, sigma, x_pairs.shape, basis_values)
    basis = left[:, :k]
    # Y V_k S_k^{-1}: the exact operator is A = B Q^H; its restriction to span(Q) is Q^H B.
    image = right(y_pairs, k) / sigma[:k]
    reduced = basis.conj().T @ image
    if debias != "none":
        basis_h = basis.conj().T
        reduced = debiased_operator(basis_h @ x_pairs, basis_h @ y_pairs, debias)
        # A = Q A~ Q^H, i.e. image = Q A~: exact modes then equal projected ones.
        image = basis @ reduced
        mode_type = "projected"
    eigenvalue, vectors = scipy.linalg.eig(reduced)
    eigenvalue = eigenvalue.astype(np.complex128)

    projected = basis @ vectors
    if mode_type == "exact":
        modes = image @ vectors
        radius = np.max(np.abs(eigenvalue))
        small = np.abs(eigenvalue) <= ZERO_EIGENVALUE * radius if radius > 0 else np.ones(k, bool)
        modes[:, small] = projected[:, small]
    else:
        modes = projected
    modes = normalize_modes(modes)

    offset = fixed_point = None
    if offset_terms is not None:
        x_mean, y_mean = offset_terms
        offset = y_mean - image @ (basis.conj().T @ x_mean)
        full_operator = image @ basis.conj().T
        system = np.eye(n_state, dtype=full_operator.dtype) - full_operator
        fixed_point, *_ = scipy.linalg.lstsq(system, offset, lapack_driver="gelsd")

    removed = np.flatnonzero(~keep)
    segment_end = int(removed[0]) + 1 if removed.size else n_snapshots
    segment = data[:, :segment_end]
    if fixed_point is not None:
        segment = segment - fixed_point[:, None]
    amplitude = optimal_amplitudes(modes, eigenvalue, segment)

    order = spectrum.spectrum_order(eigenvalue, amplitude, step, "amplitude")
    return DMDFit(
        eigenvalue=eigenvalue[order],
        modes=np.ascontiguousarray(modes[:, order]),
        amplitude=amplitude[order],
        operator=reduced,
        operator_basis=basis,
        dt=step,
        rank=k,
        offset=offset,
        fixed_point=fixed_point,
        pair_singular_value=sigma,
        n_pairs=int(used.size),
        amplitude_snapshots=segment_end,
        mode_type=mode_type,
    )


def normalize_modes(modes: ArrayLike) -> np.ndarray:
    """Unit-norm columns whose largest-magnitude entry is real and positive.

    Among entries within a relative ``1e-10`` of the largest magnitude the first one is
    the reference, so rounding-level near-ties do not flip the choice between runs.
    Zero columns stay zero.

    Examples
    --------
    >>> normalize_modes(np.array([[0.0], [-2j]]))
    array([[0.+0.j],
           [1.+0.j]])
    """
    phi = np.array(modes, dtype=np.complex128)
    if phi.ndim != 2:
        raise FitError(f"modes must be a 2-D array (state x mode); got shape {phi.shape}")
    norm = np.linalg.norm(phi, axis=0)
    magnitude = np.abs(phi)
    top = magnitude.max(axis=0, initial=0.0)
    # The reference entry has magnitude >= (1 - PHASE_TIE) * top > 0 for non-zero columns.
    reference = np.argmax(magnitude >= (1.0 - PHASE_TIE) * top[None, :], axis=0)
    pivot = phi[reference, np.arange(phi.shape[1])]
    size = np.abs(pivot)
    nonzero = norm > 0
    scale = np.where(nonzero, np.conj(pivot) / np.where(nonzero, size * norm, 1.0), 1.0)
    phi *= scale[None, :]
    # Rounding in the product can leave -0j or 1e-17j on the reference entry: pin it.
    columns = np.arange(phi.shape[1])
    phi[reference, columns] = np.abs(phi[reference, columns])
    return phi


def run_pair_mask(run_lengths: ArrayLike) -> np.ndarray:
    """``pair_mask`` that removes every pair crossing from one run into the next.

    Parameters
    ----------
    run_lengths : array_like of int
        Snapshots per run, in the order the runs are concatenated.

    Examples
    --------
    >>> run_pair_mask([3, 2])
    array([False, False,  True, False])
    """
    lengths = run_lengths_array(run_lengths)
    mask = np.zeros(int(lengths.sum()) - 1, dtype=bool)
    mask[np.cumsum(lengths)[:-1] - 1] = True
    return mask


def _thin_svd(
    matrix: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, Callable[[np.ndarray, int], np.ndarray]]:
    """``matrix = W diag(s) V^H``; returns W, s and ``apply(Y, k) = Y @ V[:, :k]``.

    Pair matrices are wide (r up to a few hundred, pairs up to 1e5): an SVD of the r x r
    factor of a QR of ``matrix^H`` costs a fraction of a direct SVD and is as stable
    (Golub & Van Loan, "Matrix Computations", sec. 8.6, R-bidiagonalization). ``V`` is
    never formed: ``Y V = (Y Q) Z``.
    """
    n_rows, n_cols = matrix.shape
    if n_cols <= 2 * n_rows:
        left, sigma, right_h = scipy.linalg.svd(matrix, full_matrices=False, lapack_driver="gesdd")
        return left, sigma, lambda other, k: other @ right_h[:k].conj().T
    orthonormal, triangle = scipy.linalg.qr(matrix.conj().T, mode="economic")
    # matrix = triangle^H orthonormal^H, and triangle^H = W diag(s) Z^H, so V = orthonormal Z.
    left, sigma, small_h = scipy.linalg.svd(
        triangle.conj().T, full_matrices=False, lapack_driver="gesdd"
    )
    return left, sigma, lambda other, k: (other @ orthonormal) @ small_h[:k].conj().T


def _basis_values(values: ArrayLike, n_state: int) -> np.ndarray:
    array = finite_vector(values, "singular_values", size=n_state)
    if np.iscomplexobj(array):
        raise FitError("singular_values must be real")
    return array


def _truncation(
    rank: object,
    sigma: np.ndarray,
    shape: tuple[int, int],
    basis_values: np.ndarray | None,
) -> int:
    """Resolve the rank option against the singular values of the X pair matrix."""
    if sigma.size == 0 or sigma[0] == 0:
        raise FitError(
            "the X pair matrix is zero (all snapshots used as inputs vanish); nothing to fit"
        )
    numerical = int(np.count_nonzero(sigma > sigma[0] * max(shape) * np.finfo(float).eps))
    if rank is None:
        return numerical
    if isinstance(rank, bool):
        raise FitError(
            f"rank must be an int, an energy fraction in (0, 1), 'optimal' or None; got {rank!r}"
        )
    if isinstance(rank, numbers.Integral):
        k = int(rank)
        if not 1 <= k <= numerical:
            raise FitError(
                f"rank {k} is not available: the X pair matrix ({shape[0]} x {shape[1]}) has "
                f"numerical rank {numerical}; choose 1 <= rank <= {numerical}"
            )
        return k
    if isinstance(rank, numbers.Real):
        if not 0 < float(rank) < 1:
            raise FitError(
                f"a float rank is an energy fraction and must be in (0, 1); got {rank!r}"
            )
        values = sigma if basis_values is None else basis_values
        return min(choose_rank(values, energy=float(rank)), numerical)
    if rank == "optimal":
        if basis_values is not None:
            raise FitError(
                "rank='optimal' with singular_values needs the shape of the original data; "
                "call choose_rank(singular_values, method='optimal', shape=(n, m)) "
                "and pass the integer"
            )
        return min(choose_rank(sigma, method="optimal", shape=shape), numerical)
    raise FitError(
        f"rank must be an int, an energy fraction in (0, 1), 'optimal' or None; got {rank!r}"
    )
