"""The compress methods: one registry of what each method is, reads and holds.

Every place that needs to know the compress methods asks this module: the workflow
schema (the allowed values of ``compress.method``), the command line (help text and
``--method`` checks), the tile planner (:mod:`snaplift.archive.plan`: widths, passes and
the driver's memory terms) and the streaming front door (:mod:`snaplift.stream.compress`:
widths, the tile shape and the rank check). The passes themselves (what a method does to
the tiles) are bound to the names by :data:`snaplift.stream.compress.METHOD_PASSES`, one layer
up, since they read tiles; ``tests/linalg/test_method_conformance.py`` runs every method
of :data:`METHODS` against numpy's SVD.

The module is pure arithmetic on plain numbers (no archive, no array), so every layer can
import it.

References
----------
- sketch: Tropp, Yurtsever, Udell, Cevher (2017), "Practical sketching algorithms for
  low-rank matrix approximation", SIAM J. Matrix Anal. Appl.; (2019) "Streaming low-rank
  matrix approximation with an application to scientific simulation", SIAM J. Sci. Comput.
- randomized: Halko, Martinsson, Tropp (2011), "Finding structure with randomness",
  SIAM Review.
- tsqr: Demmel, Grigori, Hoemmen, Langou (2012), "Communication-optimal parallel and
  sequential QR and LU factorizations", SIAM J. Sci. Comput.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Protocol

from snaplift.errors import ArchiveError, ConfigError

__all__ = [
    "METHODS",
    "METHOD_NAMES",
    "CompressMethod",
    "check_rank",
    "get_method",
    "methods_help",
    "row_map_bytes",
]

#: nonzeros per row of the sparse sign co-range map (``linalg._testmatrix.SPARSE_NONZEROS``;
#: tests/linalg/test_sketch_maps.py holds the model to the map's own ``nbytes``)
SPARSE_MAP_NONZEROS = 8


def row_map_bytes(kind: str, rows: int, width: int, itemsize: int = 8) -> int:
    """Bytes a process keeps for ``rows`` rows of a co-range row map of this kind."""
    if kind == "sparse":  # int32 column + float64 sign per nonzero, an int32 column pointer per row
        return int(rows) * (max(1, min(int(width), SPARSE_MAP_NONZEROS)) * (4 + 8) + 4)
    return int(rows) * int(width) * int(itemsize)


def check_rank(rank: int, n: int, m: int) -> None:
    """``compress.rank`` must not exceed ``min(n, m)`` of the (n x m) snapshot matrix: the one check."""
    if int(rank) > min(int(n), int(m)):
        raise ArchiveError(
            f"compress.rank = {rank} exceeds what the data allow: the snapshot matrix has at most {n} points and "
            f"{m} snapshots; use compress.rank <= {min(int(n), int(m))}"
        )


class CompressMethod(Protocol):
    """What a compress method is, reads and holds (what it runs: :data:`snaplift.stream.compress.METHOD_PASSES`).

    ``widths`` are the range and co-range sketch widths ``(k, l)`` accumulated next to each
    tile (clipped to the matrix when ``n`` and ``m`` are given); ``passes`` the reads of the
    archive; ``driver_bytes`` and ``cache_bytes`` the memory terms of the planner's model
    (``s`` bytes per value, ``n`` rows, ``m`` snapshots; ``corange_columns`` the columns of
    the co-range state: ``l`` per field, or the field's own rows when it has no more than ``l``);
    ``whole_columns`` says that a tile holds every snapshot of its row block.
    """

    name: str
    summary: str
    whole_columns: bool

    def widths(self, rank: int, *, oversample: int = 10, sketch_widths: tuple[int, int] | None = None,
               n: int | None = None, m: int | None = None) -> tuple[int, int]: ...

    def passes(self, *, power_iterations: int = 1, check_pass: bool = False) -> int: ...

    def driver_bytes(self, *, n: int, m: int, corange_columns: int, rank: int, widths: tuple[int, int], itemsize: int,
                     cache: int) -> int: ...

    def cache_bytes(self, *, n: int, widths: tuple[int, int], itemsize: int, corange_map: str) -> int: ...


class _Sketch:
    """Single-pass sketch (Tropp et al. 2017/2019): range ``X Omega`` and co-range ``Psi X`` in one read."""

    name = "sketch"
    summary = "one read (+1 with check_pass), estimates (Tropp et al. 2017/2019)"
    whole_columns = False

    def widths(self, rank: int, *, oversample: int = 10, sketch_widths: tuple[int, int] | None = None,
               n: int | None = None, m: int | None = None) -> tuple[int, int]:
        # (2r + 1, 2k + 1): Tropp et al. 2017, Sec. 4.5
        k, l = (int(w) for w in sketch_widths) if sketch_widths is not None else (2 * int(rank) + 1,
                                                                                  4 * int(rank) + 3)
        if n is not None and m is not None:
            k = min(k, n, m)
            l = min(max(l, k), n)
        return k, l

    def passes(self, *, power_iterations: int = 1, check_pass: bool = False) -> int:
        return 2 if check_pass else 1

    def driver_bytes(self, *, n: int, m: int, corange_columns: int, rank: int, widths: tuple[int, int], itemsize: int,
                     cache: int) -> int:
        # the driver regenerates the row test matrix to form Psi Q when the sketch is finished
        k, l = widths
        return itemsize * (2 * n * k + n * rank + corange_columns * m + n) + cache

    def cache_bytes(self, *, n: int, widths: tuple[int, int], itemsize: int, corange_map: str) -> int:
        return row_map_bytes(corange_map, n, widths[1], itemsize)


class _Randomized:
    """Randomized SVD with QR-stabilised power iterations (Halko et al. 2011): ``2 + 2q`` reads."""

    name = "randomized"
    summary = "2 + 2 power_iterations reads, exact coefficients (Halko et al. 2011)"
    whole_columns = False

    def widths(self, rank: int, *, oversample: int = 10, sketch_widths: tuple[int, int] | None = None,
               n: int | None = None, m: int | None = None) -> tuple[int, int]:
        k = int(rank) + int(oversample)
        return (min(k, n, m) if n is not None and m is not None else k), 0

    def passes(self, *, power_iterations: int = 1, check_pass: bool = False) -> int:
        return 2 + 2 * int(power_iterations)

    def driver_bytes(self, *, n: int, m: int, corange_columns: int, rank: int, widths: tuple[int, int], itemsize: int,
                     cache: int) -> int:
        k = widths[0]
        return itemsize * (3 * n * k + m * k + n)

    def cache_bytes(self, *, n: int, widths: tuple[int, int], itemsize: int, corange_map: str) -> int:
        return 0


class _Tsqr:
    """TSQR of row blocks x all snapshots (Demmel et al. 2012): two reads, exact."""

    name = "tsqr"
    summary = "two reads, exact; tiles hold every snapshot (Demmel et al. 2012)"
    whole_columns = True

    def widths(self, rank: int, *, oversample: int = 10, sketch_widths: tuple[int, int] | None = None,
               n: int | None = None, m: int | None = None) -> tuple[int, int]:
        return 0, 0

    def passes(self, *, power_iterations: int = 1, check_pass: bool = False) -> int:
        return 2

    def driver_bytes(self, *, n: int, m: int, corange_columns: int, rank: int, widths: tuple[int, int], itemsize: int,
                     cache: int) -> int:
        # the R factors of the leaves depend on the tile height: the planner adds them
        return itemsize * (n * rank + n)

    def cache_bytes(self, *, n: int, widths: tuple[int, int], itemsize: int, corange_map: str) -> int:
        return 0


#: every compress method by name, in the order the help lists them
METHODS: Mapping[str, CompressMethod] = {method.name: method for method in (_Randomized(), _Sketch(), _Tsqr())}
METHOD_NAMES: tuple[str, ...] = tuple(METHODS)


def get_method(name: str, *, key: str = "compress.method") -> CompressMethod:
    """The method called ``name``; a :class:`~snaplift.errors.ConfigError` naming the choices otherwise."""
    try:
        return METHODS[name]
    except (KeyError, TypeError):
        raise ConfigError(f"{key} {name!r} is not one of {', '.join(METHOD_NAMES)}") from None


def methods_help() -> str:
    """One line per method for ``--help`` texts: ``randomized: 2 + 2 ... reads; sketch: ...``."""
    return "; ".join(f"{method.name}: {method.summary}" for method in METHODS.values())
