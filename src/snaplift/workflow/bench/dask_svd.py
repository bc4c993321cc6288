"""``python -m snaplift.workflow.bench.dask_svd ARCHIVE RANK Q``: dask's ``svd_compressed``
alone (compress only) on the bench's archive, as a whole command; prints the singular
values as one JSON line (the bench scores them against the archive's known ones).

``dask.array.linalg.svd_compressed`` (randomized SVD with ``Q`` power iterations, Halko,
Martinsson & Tropp 2011), threads, dask chunks of whole stored chunks in time (~128 MiB).
"""

from __future__ import annotations

import json
import sys

import numpy as np


def main(argv: list[str]) -> None:
    import dask
    import dask.array as da
    import h5py

    path, rank, q = argv[0], int(argv[1]), int(argv[2])
    with h5py.File(path, "r") as h5:
        data = h5["u"]
        chunk = max(1, (data.chunks or data.shape)[0])
        # whole stored chunks in time, ~128 MiB per dask chunk (a 2 MiB snapshot per task
        # would time dask's scheduler, not its arithmetic)
        block = chunk * max(1, (128 * 2**20) // (chunk * int(np.prod(data.shape[1:])) * data.dtype.itemsize))
        flat = (data.shape[0], int(np.prod(data.shape[1:])))
        x = da.from_array(data, chunks=(block, *data.shape[1:]), lock=True).reshape(flat)
        with dask.config.set(scheduler="threads"):
            _, s, _ = da.linalg.svd_compressed(x, k=rank, n_power_iter=q, seed=0, compute=True)
            s = np.asarray(s.compute() if hasattr(s, "compute") else s)
    print(json.dumps({"singular_value": s.tolist()}))


if __name__ == "__main__":
    main(sys.argv[1:])
