"""All three compress methods over an HDF5 archive against numpy.linalg.svd (LAPACK).

Matrices have a known decaying spectrum, sigma_j = 0.8^j or j^-2, real and complex.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import subspace_angles

from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import ThreadRunner

N, M, RANK = 600, 80, 8


def _spectrum(decay: str) -> np.ndarray:
    j = np.arange(1, M + 1, dtype=float)
    return 0.8**j if decay == "geometric" else j**-2.0


@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
@pytest.mark.parametrize("decay", ["geometric", "algebraic"])
@pytest.mark.parametrize("method", ["sketch", "randomized", "tsqr"])
def test_singular_values_and_subspaces_match_numpy(archive, snapshot_matrix, known, method, decay,
                                                   complex_valued):
    x = known(N, M, _spectrum(decay), complex_valued=complex_valued, seed=3)
    reader, stored, _ = archive(x, grid=(20, 30))
    matrix, plan = snapshot_matrix(reader, method, 4 * 2**20, workers=2, rank=RANK, power_iterations=2)
    options = CompressOptions(method=method, rank=RANK, power_iterations=2, seed=5, scale="none")
    with ThreadRunner(2) as runner:
        result = compress(matrix, plan, options, runner=runner)
    u_ref, s_ref, _ = np.linalg.svd(stored, full_matrices=False)  # reference: LAPACK via numpy
    relative = np.abs(result.lowrank.singular_value - s_ref[:RANK]) / s_ref[:RANK]
    basis = np.asarray(result.lowrank.basis)
    np.testing.assert_allclose(basis.conj().T @ basis, np.eye(RANK), atol=1e-12)
    angle = subspace_angles(basis[:, :4], u_ref[:, :4]).max()
    if method == "tsqr":
        # exact method: LAPACK-level agreement (issue 3 target 1e-10)
        assert relative.max() < 1e-10 and angle < 1e-8
        assert result.passes == 2 and result.projection_kind == "exact"
    elif method == "randomized":
        # q = 2 power iterations on a decaying spectrum: issue 3 target 1e-6 for the geometric
        # decay (Halko et al. 2011, Cor. 10.10 gives (sigma_{k+1}/sigma_k)^(2q+1) factors);
        # the slow j^-2 decay is looser (same corollary with a flat-ish tail)
        assert relative.max() < (1e-6 if decay == "geometric" else 1e-3)
        assert angle < (1e-5 if decay == "geometric" else 1e-2)
        assert result.passes == 2 + 2 * 2 and result.projection_kind == "exact"
    else:
        # one pass, widths (2r+1, 2k+1): no power iteration, so the leading values carry the
        # tail's weight (Tropp et al. 2017, Thm 4.3 / Sec. 6); measured ~1e-3 .. 3e-2 here
        assert relative[:4].max() < (5e-2 if decay == "geometric" else 2e-1)
        assert result.passes == 1 and result.projection_kind == "estimate"
    assert result.bytes_read == result.passes * stored.size * stored.itemsize


def test_sketch_check_pass_gives_exact_coefficients(archive, snapshot_matrix, known):
    x = known(N, M, _spectrum("geometric"), seed=4)
    reader, stored, _ = archive(x, grid=(20, 30))
    matrix, plan = snapshot_matrix(reader, "sketch", rank=RANK, check_pass=True)
    result = compress(matrix, plan, CompressOptions(method="sketch", rank=RANK, check_pass=True, scale="none"))
    basis = np.asarray(result.lowrank.basis)
    # reference: direct numpy projection of the data on the returned basis
    np.testing.assert_allclose(result.lowrank.coefficient, basis.conj().T @ stored, atol=1e-12)
    residual = np.linalg.norm(stored - basis @ (basis.conj().T @ stored), axis=0) / np.linalg.norm(stored, axis=0)
    np.testing.assert_allclose(result.lowrank.projection_error(), residual, rtol=1e-6, atol=1e-9)
    assert (result.passes, result.projection_kind) == (2, "exact")


def test_float32_archive_is_accumulated_in_float64(archive, snapshot_matrix, known):
    x = known(300, 40, 0.7 ** np.arange(1, 41), seed=6)
    reader32, stored32, _ = archive(x, dtype=np.float32, name="f32.h5")
    reader64, _, _ = archive(stored32.astype(np.float64), name="f64.h5")
    out = []
    for reader in (reader32, reader64):
        matrix, plan = snapshot_matrix(reader, "randomized", rank=5)
        assert matrix.dtype == np.float64
        out.append(compress(matrix, plan, CompressOptions(method="randomized", rank=5, scale="none")))
    # the same float64 values in both archives, so the same arithmetic (common practice: exact equality)
    np.testing.assert_array_equal(out[0].lowrank.singular_value, out[1].lowrank.singular_value)
    assert out[0].bytes_read * 2 == out[1].bytes_read  # bytes read are stored bytes (4 vs 8 per value)


def test_centred_and_scaled_sketch_matches_prepared_numpy(archive, snapshot_matrix, known):
    # A = (X - mean) / rms computed by hand; the sketch corrected after the pass must see the same A
    x = known(400, 60, 0.75 ** np.arange(1, 61), seed=7) + 3.0
    reader, stored, _ = archive(x)
    matrix, plan = snapshot_matrix(reader, "tsqr", rank=6)
    result = compress(matrix, plan, CompressOptions(method="tsqr", rank=6, center=True, scale="rms"))
    centred = stored - stored.mean(axis=1, keepdims=True)
    rms = np.sqrt(np.mean(centred**2))  # reference: the RMS definition in snaplift.prepare
    s_ref = np.linalg.svd(centred / rms, compute_uv=False)[:6]
    np.testing.assert_allclose(result.lowrank.singular_value, s_ref, rtol=1e-10)
    # the one-pass sum(x^2) - m |mu|^2 loses ~ (mean / rms)^2 eps = (3 / 0.007)^2 * 1e-16 ~ 2e-11
    # (Chan, Golub, LeVeque 1983, on one-pass variance); a scale error only rescales A
    np.testing.assert_allclose(result.preparation.field_scale["u"], rms, rtol=1e-9)
    # randomized, q = 3: centring inside the tiles of the later passes, so near-exact
    # (Halko et al. 2011, Cor. 10.10); sketch: the corrected one-pass sketches, single-pass
    # accuracy at widths (13, 27) (measured 4e-2 on this spectrum)
    for method, tolerance in (("randomized", 1e-8), ("sketch", 1e-1)):
        matrix, plan = snapshot_matrix(reader, method, rank=6)
        other = compress(matrix, plan, CompressOptions(method=method, rank=6, center=True, scale="rms",
                                                        power_iterations=3))
        np.testing.assert_allclose(other.lowrank.singular_value[:3], s_ref[:3], rtol=tolerance)
