"""Mean errors over 20 seeds against the published expected-error bounds.

Halko, Martinsson, Tropp (2011), SIAM Review 53(2): Theorem 10.6 (q = 0) and Corollary
10.10 (power scheme), spectral norm, real Gaussian test matrix, target rank k with
oversampling p >= 2, *before* truncation to rank k:

    E ||A - Q Q^H A|| <= [(1 + sqrt(k/(p-1))) sigma_{k+1}^(2q+1)
                          + e sqrt(k+p)/p (sum_{j>k} sigma_j^(2(2q+1)))^(1/2)]^(1/(2q+1)).

Tropp, Yurtsever, Udell, Cevher (2017), SIAM J. Matrix Anal. Appl. 38(4), Theorem 4.3,
Frobenius norm of the sketch reconstruction ``Q X`` before truncation (implemented in
:func:`snaplift.linalg.sketch.sketch_error_bound`). The theorem is proved for Gaussian
maps; Tropp et al. (2019, SIAM J. Sci. Comput. 41(4), Sec. 3.3 and their experiments)
report that sparse sign maps behave the same in practice, so the default sparse co-range
map is held to the same bound.
"""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.linalg.sketch import SketchState, sketch_error_bound
from snaplift.stream._passes import Pass, build_jobs, kept_row_blocks, sketch_read
from snaplift.stream.compress import CompressOptions, _source, compress
from snaplift.stream.loop import StreamState, ThreadRunner
from snaplift.stream.sketch import sketch_reconstruction

SEEDS = range(20)


def _hmt_bound(sigma: np.ndarray, k: int, p: int, q: int) -> float:
    # Halko et al. 2011, Thm 10.6 (q = 0) and Cor. 10.10
    power = 2 * q + 1
    tail = np.sqrt(np.sum(sigma[k:] ** (2 * power)))
    inner = (1 + np.sqrt(k / (p - 1))) * sigma[k] ** power + np.e * np.sqrt(k + p) / p * tail
    return float(inner ** (1.0 / power))


@pytest.mark.parametrize("q", [0, 1])
def test_randomized_mean_error_below_halko_martinsson_tropp(archive, snapshot_matrix, known, q):
    k, p = 6, 4
    sigma = np.arange(1, 61, dtype=float) ** -1.0  # slow decay: the bound is not trivially met
    x = known(300, 60, sigma, seed=11)
    reader, stored, _ = archive(x)
    matrix, plan = snapshot_matrix(reader, "randomized", rank=k + p, oversample=0, power_iterations=q)
    errors = []
    with ThreadRunner(1) as runner:
        for seed in SEEDS:
            # rank = k + p and no extra oversampling: the basis is all of Q (no truncation)
            result = compress(matrix, plan, CompressOptions(method="randomized", rank=k + p, oversample=0,
                                                            power_iterations=q, seed=seed, scale="none"),
                              runner=runner)
            basis = np.asarray(result.lowrank.basis)
            errors.append(np.linalg.norm(stored - basis @ (basis.T @ stored), 2))
    bound = _hmt_bound(np.linalg.svd(stored, compute_uv=False), k, p, q)
    assert np.mean(errors) <= bound
    # and the bound is not vacuous: the error is at least the best possible sigma_{k+p+1}
    assert np.mean(errors) >= sigma[k + p] * (1 - 1e-9)


@pytest.mark.parametrize("corange_map", ["gaussian", "sparse"])
def test_sketch_mean_error_within_tropp_bound(archive, snapshot_matrix, known, corange_map):
    rank = 5
    k, l = 2 * rank + 1, 2 * (2 * rank + 1) + 1  # the default widths (Tropp et al. 2017, Sec. 4.5)
    sigma = np.arange(1, 61, dtype=float) ** -1.0
    x = known(300, 60, sigma, seed=12)
    reader, stored, _ = archive(x)
    matrix, plan = snapshot_matrix(reader, "sketch", rank=rank)
    row_blocks = kept_row_blocks(matrix, plan.point_blocks)
    jobs = build_jobs(matrix, row_blocks, list(matrix.blocks))
    errors = []
    with ThreadRunner(1) as runner:
        for seed in SEEDS:
            options = CompressOptions(method="sketch", rank=rank, seed=seed, scale="none", corange_map=corange_map)
            state = StreamState("bound")
            sketch_read(Pass(runner, _source(matrix, options, l, row_blocks), in_flight=2), matrix, jobs, state, k, l)
            sketch = SketchState.from_stream(state.arrays, [matrix.shape[0]], matrix.snapshot_index, seed, False,
                                             corange_map, corange_width=l)
            _, q, core = sketch_reconstruction(sketch, matrix, center=False, scale="none")
            errors.append(np.linalg.norm(stored - q @ core, "fro") ** 2)
    bound = sketch_error_bound(np.linalg.svd(stored, compute_uv=False), k, l)
    assert np.mean(errors) <= bound
    assert np.mean(errors) >= np.sum(sigma[k:] ** 2) * (1 - 1e-9)  # Eckart-Young: no rank-k beats the tail


def test_sketch_bound_formula_by_hand():
    # Tropp et al. 2017, Thm 4.3 evaluated by hand for sigma = (1, 1, 1, 0, ...), k = 3, l = 7, real:
    # f(3, 7) = 3 / 3 = 1; min over rho in {0, 1}: rho = 0 gives 1 * 3, rho = 1 gives (1 + 1/1) * 2 = 4
    sigma = np.array([1.0, 1.0, 1.0, 0.0, 0.0])
    assert sketch_error_bound(sigma, 3, 7) == pytest.approx(2 * 3)
