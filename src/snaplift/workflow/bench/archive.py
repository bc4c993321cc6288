"""The benchmark's invented archive (known singular values) and plain reads of it."""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np

__all__ = ["GRID", "MODES", "DECAY", "spectrum", "write_archive", "copy_to_zarr", "warm", "drop_page_cache",
           "raw_read", "reader_read", "layout_label", "parse_layout"]

GRID = (512, 512)
MODES = 120
DECAY = 0.95

def spectrum() -> np.ndarray:
    return DECAY ** np.arange(MODES, dtype=np.float64)


def write_archive(path: Path, n_snapshots: int, *, seed: int = 0, block: int = 64,
                  layout: tuple[int, int] = (1, 1)) -> np.ndarray:
    """Write the synthetic archive; returns its singular values (exact by construction).

    ``layout = (snapshots per chunk, pieces in space)``: each chunk holds that many
    snapshots of ``1 / pieces`` of the grid's rows (default: one whole snapshot per chunk).
    """
    import h5py

    per_chunk, pieces = layout
    if per_chunk < 1 or pieces < 1 or GRID[0] % pieces:
        raise ValueError(f"chunk layout {layout}: snapshots per chunk >= 1 and pieces dividing {GRID[0]} expected")
    rng = np.random.default_rng(seed)
    n = GRID[0] * GRID[1]
    modes = min(MODES, n_snapshots)
    u, _ = np.linalg.qr(rng.standard_normal((n, modes)))
    v, _ = np.linalg.qr(rng.standard_normal((n_snapshots, modes)))
    sigma = spectrum()[:modes]
    block = max(per_chunk, block - block % per_chunk)  # whole chunks per write
    with h5py.File(path, "w") as h5:
        h5["t"] = 0.01 * np.arange(n_snapshots)
        data = h5.create_dataset("u", shape=(n_snapshots, *GRID), dtype="f8",
                                 chunks=(min(per_chunk, n_snapshots), GRID[0] // pieces, GRID[1]))
        for j0 in range(0, n_snapshots, block):
            j1 = min(j0 + block, n_snapshots)
            data[j0:j1] = ((v[j0:j1] * sigma) @ u.T).reshape(j1 - j0, *GRID)
    return sigma


def layout_label(layout: tuple[int, int]) -> str:
    """``'8 per chunk'``, ``'8 per chunk, 1/4 of space'``."""
    per_chunk, pieces = layout
    return f"{per_chunk} per chunk" + (f", 1/{pieces} of space" if pieces > 1 else "")


def parse_layout(text: str) -> tuple[int, int]:
    """``'8'`` or ``'8x4'`` (8 snapshots per chunk, the grid split in 4 pieces)."""
    parts = text.strip().lower().split("x")
    try:
        values = tuple(int(p) for p in parts)
    except ValueError:
        values = ()
    if len(values) not in (1, 2) or min(values) < 1:
        raise ValueError(f"chunk layout {text!r}: expected SNAPSHOTS or SNAPSHOTSxPIECES, e.g. 8 or 8x4")
    if len(values) == 2 and GRID[0] % values[1]:
        raise ValueError(f"chunk layout {text!r}: pieces must divide the grid's {GRID[0]} rows")
    return (values[0], values[1] if len(values) == 2 else 1)


def copy_to_zarr(source: Path, target: Path, *, block: int = 64, same_chunks: bool = False) -> None:
    """The same data as zarr v3: no compressor, one snapshot per chunk (see module docstring),
    or with ``same_chunks`` the HDF5 dataset's own chunk shape."""
    import h5py
    import zarr

    with h5py.File(source, "r") as h5:
        data = h5["u"]
        group = zarr.open_group(str(target), mode="w")
        group.create_array("t", data=np.asarray(h5["t"]))
        chunks = tuple(data.chunks) if same_chunks and data.chunks else (1, *data.shape[1:])
        out = group.create_array("u", shape=data.shape, dtype="f8", chunks=chunks, compressors=None)
        block = max(chunks[0], block - block % chunks[0])  # whole chunks per write
        for j0 in range(0, data.shape[0], block):
            out[j0:j0 + block] = data[j0:j0 + block]


def warm(path: Path) -> None:
    """Read every byte of an archive file (or of every file under a zarr folder) once, untimed.

    Each timed case starts from a warm page cache, as issue 3 measures: a machine that
    pages out memory it sees idle (Linux DAMON-based reclaim does so on some VMs) would
    otherwise drop parts of the archive between cases and time the disk instead.
    """
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    buffer = bytearray(1 << 24)
    for name in files:
        with open(name, "rb", buffering=0) as handle:
            while handle.readinto(buffer):
                pass


def drop_page_cache() -> None:
    """Write dirty pages and drop the clean page cache (Linux ``/proc/sys/vm/drop_caches``, root)."""
    from snaplift.errors import ConfigError

    os.sync()
    try:
        with open("/proc/sys/vm/drop_caches", "w") as handle:
            handle.write("1")
    except OSError as error:
        raise ConfigError(f"--cold needs to drop the page cache through /proc/sys/vm/drop_caches (Linux, "
                          f"as root): {error}") from None


def raw_read(path: Path, fmt: str, *, block: int = 1, fresh: bool = False) -> float:
    """Read every stored chunk once (blocks of ``block`` snapshots), nothing else.

    By default into one reused buffer (HDF5 ``read_direct``, zarr ``out=``); with
    ``fresh`` into a new array per block, as the readers return tiles.
    """
    def timed(data, into) -> float:
        buffer = np.empty((block, *data.shape[1:]))
        start = time.perf_counter()
        for j0 in range(0, data.shape[0], block):
            j1 = min(j0 + block, data.shape[0])
            if fresh:
                data[j0:j1]
            else:
                into(data, buffer[: j1 - j0], j0, j1)
        return time.perf_counter() - start

    if fmt == "hdf5":
        import h5py

        with h5py.File(path, "r") as h5:
            return timed(h5["u"], lambda data, out, j0, j1: data.read_direct(out, np.s_[j0:j1]))
    import zarr
    from zarr.core.buffer.cpu import NDBuffer

    return timed(zarr.open_group(str(path), mode="r")["u"],
                 lambda data, out, j0, j1: data.get_basic_selection(np.s_[j0:j1], out=NDBuffer.from_numpy_array(out)))


def reader_read(path: Path, block: int, threads: int = 1) -> float:
    """Every tile of ``block`` snapshots through the archive reader (:func:`read_snapshot_block`),
    on ``threads`` threads as the compress runner reads them."""
    from concurrent.futures import ThreadPoolExecutor

    from snaplift.archive import open_archive
    from snaplift.archive.matrix import build_snapshot_matrix, read_snapshot_block

    reader = open_archive(str(path))
    m = reader.describe().fields["u"].n_snapshots
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(m), snapshot_block=block)

    def read(columns: tuple[int, int]) -> None:
        read_snapshot_block(reader, matrix.fields[0], matrix.snapshot_index[columns[0]:columns[1]])

    start = time.perf_counter()
    with ThreadPoolExecutor(max(1, threads), thread_name_prefix="snaplift-bench-read") as pool:
        list(pool.map(read, matrix.blocks))
    elapsed = time.perf_counter() - start
    from snaplift.archive import _handles

    _handles.release_tile_buffers()  # as compress does when it is done
    return elapsed
