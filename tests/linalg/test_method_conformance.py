"""One conformance suite for every compress method of the registry (snaplift.compress_methods).

Each test is parametrised over ``METHOD_NAMES``: a method added to the registry runs all
of them without a line here. References: numpy.linalg.svd (LAPACK) for singular values
and subspaces, scipy.linalg.subspace_angles for the subspaces; the method's own clean run
for the tiling and resume checks (the results must not depend on how tiles were cut or
where a run was stopped, up to rounding).
"""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.linalg import subspace_angles

from snaplift.archive import plan_tiles
from snaplift.archive.matrix import build_snapshot_matrix
from snaplift.compress_methods import METHOD_NAMES, METHODS, check_rank, get_method
from snaplift.errors import ArchiveError, ConfigError
from snaplift.stream.compress import METHOD_PASSES, CompressOptions, compress
from snaplift.stream.loop import ThreadRunner

N, M, RANK, TRUE_RANK = 600, 48, 5, 8


class _StoppingRunner(ThreadRunner):
    """A thread runner that raises KeyboardInterrupt (a killed run) after some results."""

    def __init__(self, workers: int, stop_after: int) -> None:
        super().__init__(workers)
        self.stop_after = stop_after
        self.results = 0
        self.lock = threading.Lock()

    def result(self, future: Any) -> Any:
        value = super().result(future)
        with self.lock:
            self.results += 1
            if self.results > self.stop_after:
                raise KeyboardInterrupt
        return value


def _low_rank(known: Any, complex_valued: bool, seed: int = 7) -> np.ndarray:
    # exact rank 8 (< every method's range width at rank 5): each method recovers it to rounding
    return known(N, M, 2.0 ** -np.arange(TRUE_RANK, dtype=float), complex_valued=complex_valued, seed=seed)


def _matrix(reader: Any, plan: Any) -> Any:
    index = np.arange(reader.describe().fields["u"].n_snapshots)
    return build_snapshot_matrix(reader, ["u"], snapshots=index, snapshot_block=1,
                                 snapshot_blocks=plan.snapshot_blocks)


def _split_plan(info: Any, method: str) -> Any:
    """The largest budget whose plan cuts the field's rows into several tiles (the smallest tiles)."""
    memory = 64 * 2**20
    found = None
    while memory > 2**14:
        try:
            plan = plan_tiles(info, ["u"], memory_bytes=memory, method=method, rank=RANK)
        except ArchiveError:
            break
        if len(plan.point_blocks[0]) > 1:
            found = plan
            if plan.n_tiles >= 6:
                return plan
        memory = int(memory * 0.8)
    assert found is not None, f"no budget splits the rows for {method}"
    return found


@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
@pytest.mark.parametrize("method", METHOD_NAMES)
def test_method_recovers_numpy_svd(archive, known, method: str, complex_valued: bool) -> None:
    x = _low_rank(known, complex_valued)
    reader, stored, _ = archive(x, grid=(20, 30), chunk=2)
    plan = plan_tiles(reader.describe(), ["u"], memory_bytes=64 * 2**20, method=method, rank=RANK)
    options = CompressOptions(method=method, rank=RANK, seed=3, scale="none")
    with ThreadRunner(2) as runner:
        result = compress(_matrix(reader, plan), plan, options, runner=runner)
    u_ref, s_ref, _ = np.linalg.svd(stored, full_matrices=False)  # reference: LAPACK via numpy
    lowrank = result.lowrank
    # an exactly rank-8 matrix and range widths >= 8: every method is exact up to rounding
    # (Halko et al. 2011, Thm 9.1 with a zero tail; Tropp et al. 2017, Thm 4.3 likewise)
    np.testing.assert_allclose(lowrank.singular_value, s_ref[:RANK], rtol=1e-9)
    basis = np.asarray(lowrank.basis)
    np.testing.assert_allclose(basis.conj().T @ basis, np.eye(RANK), atol=1e-12)  # orthonormal (common practice)
    assert subspace_angles(basis, u_ref[:, :RANK]).max() < 1e-7
    # the coefficients are the basis's projection of the data (single pass: an estimate that is
    # exact when the data lie in the sketched range, as here)
    np.testing.assert_allclose(lowrank.coefficient, basis.conj().T @ stored, atol=1e-10 * np.abs(stored).max())
    assert np.iscomplexobj(basis) == complex_valued
    described = get_method(method)
    assert result.passes == described.passes() == plan.passes
    assert (result.info["range_width"], result.info["corange_width"]) == described.widths(RANK, n=N, m=M)
    assert result.bytes_read == result.passes * stored.size * stored.itemsize


@pytest.mark.parametrize("method", METHOD_NAMES)
def test_tilings_agree(archive, known, method: str) -> None:
    x = known(N, M, 0.8 ** np.arange(1, M + 1), complex_valued=True, seed=11)
    reader, _, _ = archive(x, grid=(30, 20), chunk=2)
    info = reader.describe()
    plans = [plan_tiles(info, ["u"], memory_bytes=64 * 2**20, method=method, rank=RANK, in_memory_limit=2**30),
             plan_tiles(info, ["u"], memory_bytes=64 * 2**20, method=method, rank=RANK),
             _split_plan(info, method)]
    assert plans[0].in_memory and not plans[2].in_memory and len(plans[2].point_blocks[0]) > 1
    results = [compress(_matrix(reader, plan), plan, CompressOptions(method=method, rank=RANK, seed=2))
               for plan in plans]
    first = results[0].lowrank
    for other in results[1:]:
        # test matrices are keyed by global row and snapshot, not by tile (Tropp et al. 2017,
        # Sec. 2.3): only the summation order differs
        np.testing.assert_allclose(other.lowrank.singular_value, first.singular_value, rtol=1e-11)
        np.testing.assert_allclose(other.lowrank.coefficient, first.coefficient, rtol=0,
                                   atol=1e-11 * np.abs(first.coefficient).max())


@pytest.mark.parametrize("method", METHOD_NAMES)
def test_resumed_run_equals_clean_run(archive, known, tmp_path: Path, method: str) -> None:
    x = known(N, M, 0.8 ** np.arange(1, M + 1), seed=13)
    reader, _, _ = archive(x, grid=(30, 20), chunk=2)
    plan = _split_plan(reader.describe(), method)
    matrix = _matrix(reader, plan)
    options = CompressOptions(method=method, rank=RANK, center=True, seed=4)
    clean = compress(matrix, plan, options)
    folder = tmp_path / "checkpoints"
    stop = max(2, plan.passes * plan.n_tiles // 2)  # half-way through the method's reads
    with _StoppingRunner(2, stop) as runner, pytest.raises(KeyboardInterrupt):
        compress(matrix, plan, options, runner=runner, checkpoint_dir=folder, checkpoint_every=2)
    with ThreadRunner(2) as runner:
        resumed = compress(matrix, plan, options, runner=runner, checkpoint_dir=folder, checkpoint_every=2)
    assert resumed.info["resumed"]
    # the same tile results summed with other checkpoint boundaries: equal to rounding
    np.testing.assert_allclose(resumed.lowrank.singular_value, clean.lowrank.singular_value, rtol=1e-12)
    np.testing.assert_allclose(resumed.lowrank.coefficient, clean.lowrank.coefficient, rtol=0,
                               atol=1e-12 * np.abs(clean.lowrank.coefficient).max())
    assert resumed.bytes_read < clean.bytes_read  # what the killed run checkpointed is not read again


def test_every_registered_method_runs_and_every_runner_is_registered() -> None:
    # the registry (what a method is) and the stream's table (what it runs) name the same methods
    assert set(METHOD_PASSES) == set(METHOD_NAMES)


@pytest.mark.parametrize("method", METHOD_NAMES)
def test_registry_entry_is_complete(method: str) -> None:
    described = METHODS[method]
    assert described.name == method and described.summary
    k, l = described.widths(RANK)
    assert k == 0 or k >= RANK  # a range sketch narrower than the rank cannot hold the basis (common practice)
    assert described.widths(RANK, n=4, m=3)[0] <= 3  # clipped to the matrix
    assert described.passes(power_iterations=2) >= 1
    cache = described.cache_bytes(n=1000, widths=(k, l), itemsize=8, corange_map="sparse")
    driver = described.driver_bytes(n=1000, m=50, corange_columns=l, rank=RANK, widths=(k, l), itemsize=8,
                                    cache=cache)
    assert driver >= 8 * 1000 * RANK  # at least the basis (n x r)


def test_rank_and_method_are_checked_once_with_one_error_each() -> None:
    check_rank(5, 10, 5)
    with pytest.raises(ArchiveError, match=r"compress.rank = 6 exceeds .* at most 10 points and 5 snapshots"):
        check_rank(6, 10, 5)
    with pytest.raises(ConfigError, match="compress.method 'svd' is not one of randomized, sketch, tsqr"):
        get_method("svd")
