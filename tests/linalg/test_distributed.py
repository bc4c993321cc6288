"""Threads and a distributed LocalCluster of worker processes agree (HDF5 read in the workers)."""

from __future__ import annotations

import os

import numpy as np

from snaplift.cluster import open_scheduler
from snaplift.linalg.compress import CompressOptions, compress
from snaplift.linalg.streaming import ClientRunner, runner_for
from snaplift.workflow.schema import ClusterSection


def test_threads_and_local_processes_agree(archive, snapshot_matrix, known):
    def worker_facts() -> dict[str, object]:  # nested, so it is pickled by value for the workers
        import os

        from snaplift.archive import _handles
        from snaplift.linalg import _testmatrix

        return {"pid": os.getpid(), "blas": os.environ.get("OPENBLAS_NUM_THREADS"),
                "handles": _handles.cached_handle_count(), "cache": _testmatrix.cache_info()["generated"]}

    x = known(700, 60, 0.8 ** np.arange(1, 61), seed=51, complex_valued=True)
    reader, _, _ = archive(x, grid=(35, 20))
    settings = {"sketch": {}, "randomized": {"power_iterations": 1}, "tsqr": {}}
    plans = {m: snapshot_matrix(reader, m, memory=8 * 2**20, workers=2, rank=6) for m in settings}
    threaded = {}
    with open_scheduler(ClusterSection(kind="threads", workers=2)) as scheduler, runner_for(scheduler) as runner:
        for method, (matrix, plan) in plans.items():
            threaded[method] = compress(matrix, plan, CompressOptions(method=method, rank=6, center=True,
                                                                      **settings[method]), runner=runner)
    with open_scheduler(ClusterSection(kind="local", workers=2)) as scheduler, runner_for(scheduler) as runner:
        assert isinstance(runner, ClientRunner) and runner.workers == 2
        for method, (matrix, plan) in plans.items():
            local = compress(matrix, plan, CompressOptions(method=method, rank=6, center=True, **settings[method]),
                             runner=runner)
            reference = threaded[method]
            # same tiles, same kernels, same fold order: agreement to rounding (issue 3: 1e-12)
            np.testing.assert_allclose(local.lowrank.singular_value, reference.lowrank.singular_value, rtol=1e-12)
            np.testing.assert_allclose(local.lowrank.coefficient, reference.lowrank.coefficient, rtol=0,
                                       atol=1e-12 * np.abs(reference.lowrank.coefficient).max())
            assert local.bytes_read == reference.bytes_read and local.passes == reference.passes
        facts = scheduler.client.run(worker_facts)
    assert len({f["pid"] for f in facts.values()} - {os.getpid()}) == 2  # real worker processes
    assert all(f["blas"] == "1" for f in facts.values())  # BLAS single-threaded inside tasks
    assert all(f["handles"] >= 1 for f in facts.values())  # each worker opened the HDF5 file itself
    assert all(f["cache"] >= 1 for f in facts.values())  # and generated its own row test matrix
