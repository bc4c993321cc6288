"""The sparse sign co-range map of ``sketch`` (Tropp, Yurtsever, Udell, Cevher 2019, Sec. 3.3).

References: the map's definition (``zeta`` distinct uniformly placed +-1 entries per row,
Tropp et al. 2019; Floyd's uniform sampling without replacement, Bentley & Floyd 1987);
numpy dense products for the sparse kernels; numpy.linalg.svd for the sketch's accuracy
next to the Gaussian map.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from snaplift.archive.plan import row_map_bytes
from snaplift.errors import ArchiveError
from snaplift.linalg._testmatrix import SparseSignMap, apply_corange, apply_left, row_map
from snaplift.linalg.sketch import SketchState, merge_sketches
from snaplift.stream.compress import CompressOptions, compress, sketch_append


def test_rows_hold_zeta_distinct_signed_entries():
    psi = SparseSignMap(100, 5100, 163, seed=3)
    assert psi.zeta == 8 and psi.shape == (5000, 163)
    dense = psi.dense()
    assert np.all(np.count_nonzero(dense, axis=1) == 8)  # distinct columns: no two entries collide
    assert set(np.unique(dense[dense != 0])) == {-1.0, 1.0}
    assert SparseSignMap(0, 10, 5, seed=0).zeta == 5  # zeta = min(l, 8): a full row when l <= 8


def test_columns_are_uniform_and_signs_balanced():
    # Floyd's algorithm picks every zeta-subset with equal probability (Bentley & Floyd 1987),
    # so each column is hit zeta/l of the time: chi-square goodness of fit (scipy.stats)
    width, rows = 37, 40000
    psi = SparseSignMap(0, rows, width, seed=11)
    counts = np.bincount(psi.columns.ravel(), minlength=width)
    assert stats.chisquare(counts).pvalue > 1e-4
    # unordered pairs of columns in one row are uniform too (a property of uniform subsets,
    # not only of the marginals; Floyd's order within a row is not uniform, the set is)
    first, second = np.triu_indices(psi.zeta, 1)
    low = np.minimum(psi.columns[:, first], psi.columns[:, second]).ravel()
    high = np.maximum(psi.columns[:, first], psi.columns[:, second]).ravel()
    pairs = np.bincount(low * width + high, minlength=width * width).reshape(width, width)
    assert stats.chisquare(pairs[np.triu_indices(width, 1)]).pvalue > 1e-4
    assert stats.binomtest(int(np.sum(psi.signs > 0)), psi.signs.size).pvalue > 1e-4


def test_rows_are_keyed_by_global_index():
    whole = SparseSignMap(0, 3000, 50, seed=7).dense()
    for start, stop in [(0, 1), (255, 257), (1000, 2999), (2999, 3000)]:
        np.testing.assert_array_equal(SparseSignMap(start, stop, 50, seed=7).dense(), whole[start:stop])
    assert not np.array_equal(SparseSignMap(0, 3000, 50, seed=8).dense(), whole)


@pytest.mark.parametrize("complex_valued", [False, True])
def test_sparse_products_equal_dense_numpy(complex_valued):
    rng = np.random.default_rng(0)
    rows, snapshots = 9000, 13  # more rows than one transposed chunk
    raw = rng.standard_normal((snapshots, rows))
    basis = rng.standard_normal((rows, 4))
    if complex_valued:
        raw = raw + 1j * rng.standard_normal(raw.shape)
        basis = basis + 1j * rng.standard_normal(basis.shape)
    psi = row_map(500, 500 + rows, 21, seed=2, complex_valued=complex_valued, kind="sparse")
    dense = psi.dense()
    np.testing.assert_allclose(apply_corange(raw, psi), raw @ dense, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(apply_left(psi, basis), dense.T @ basis, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(apply_left(psi, basis[:, 0]), dense.T @ basis[:, 0], rtol=1e-12, atol=1e-12)


def test_kept_bytes_model():
    psi = SparseSignMap(0, 4096, 163, seed=0)
    # per row: zeta = 8 int32 columns and float64 signs, one int32 pointer of the chunk matrices
    assert psi.nbytes == row_map_bytes("sparse", 4096, 163) == 4096 * (8 * 12 + 4)
    assert row_map_bytes("gaussian", 4096, 163) == 4096 * 163 * 8
    # the planner's model of narrow maps (zeta = width < 8) against the maps themselves
    for width in (1, 3, 8, 9):
        assert SparseSignMap(0, 100, width, seed=1).nbytes == row_map_bytes("sparse", 100, width)


def _sigma() -> np.ndarray:
    return 0.85 ** np.arange(60, dtype=float)


@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
def test_sparse_and_gaussian_sketch_are_equally_accurate(archive, snapshot_matrix, known, complex_valued):
    # numpy.linalg.svd is the reference; the sparse map must do as well as the Gaussian one
    # over 10 seeds (Tropp et al. 2019 report equal accuracy; tolerance: common practice)
    x = known(1200, 60, _sigma(), complex_valued=complex_valued, seed=1)
    reader, stored, _ = archive(x, grid=(30, 40))
    s_ref = np.linalg.svd(stored, compute_uv=False)[:6]
    errors = {}
    for corange_map in ("gaussian", "sparse"):
        matrix, plan = snapshot_matrix(reader, "sketch", rank=6, corange_map=corange_map)
        values = []
        for seed in range(10):
            options = CompressOptions(method="sketch", rank=6, seed=seed, scale="none", corange_map=corange_map)
            result = compress(matrix, plan, options)
            assert result.info["corange_map"] == corange_map
            values.append(np.max(np.abs(result.lowrank.singular_value - s_ref) / s_ref))
        errors[corange_map] = float(np.mean(values))
    # measured: real 0.084 (Gaussian) / 0.090 (sparse), complex 0.070 / 0.052 (one pass on a
    # slow 0.85^j decay: the leading values carry the tail, Tropp et al. 2017, Sec. 6)
    assert errors["gaussian"] < 0.2 and errors["sparse"] < 0.2
    assert errors["sparse"] <= 1.5 * errors["gaussian"]


def test_plan_keeps_the_small_map(archive, snapshot_matrix, known):
    x = known(1200, 40, _sigma()[:40], seed=2)
    reader, _, _ = archive(x, grid=(30, 40))
    _, sparse_plan = snapshot_matrix(reader, "sketch", rank=5)
    _, gaussian_plan = snapshot_matrix(reader, "sketch", rank=5, corange_map="gaussian")
    k, l = sparse_plan.range_width, sparse_plan.corange_width
    assert (k, l) == (11, 23)
    assert sparse_plan.cache_bytes == 1200 * (8 * 12 + 4)  # zeta = 8 columns and signs, one pointer, per row
    assert gaussian_plan.cache_bytes == 1200 * l * 8


def test_stored_state_keeps_its_map_and_appends_refuse_another(archive, snapshot_matrix, known):
    x = known(600, 30, _sigma()[:30], seed=3)
    reader, _, _ = archive(x, grid=(20, 30))
    matrix, plan = snapshot_matrix(reader, "sketch", rank=4)
    result = compress(matrix, plan, CompressOptions(method="sketch", rank=4, scale="none"))
    state = SketchState.from_arrays(result.sketch_state)
    assert state.corange_map == "sparse"
    older = dict(result.sketch_state, parameters=result.sketch_state["parameters"][:4])  # a store from before
    assert SketchState.from_arrays(older).corange_map == "gaussian"
    first, plan_first = snapshot_matrix(reader, "sketch", rank=4, snapshots=np.arange(20))
    rest, plan_rest = snapshot_matrix(reader, "sketch", rank=4, snapshots=np.arange(20, 30))
    old = compress(first, plan_first, CompressOptions(method="sketch", rank=4, scale="none",
                                                      corange_map="gaussian")).sketch_state
    merged = sketch_append(old, rest, plan_rest)  # the stored map is used for the new snapshots
    assert merged.corange_map == "gaussian"
    new = compress(rest, plan_rest, CompressOptions(method="sketch", rank=4, scale="none")).sketch_state
    with pytest.raises(ArchiveError, match="co-range map gaussian; the new one .* co-range map sparse"):
        merge_sketches(SketchState.from_arrays(old), SketchState.from_arrays(new))
