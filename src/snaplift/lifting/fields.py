"""Observables of the raw field: pure per-tile kernels, fused into the archive read.

- :func:`pointwise_terms` maps a tile (points, snapshots) to the stacked values of a few
  pointwise functions (x, x^2, x^3, |x|, sin x, cos x); it acts on each entry alone, so
  it can run on any tile of any field without neighbours.
- Delays (Hankel stacking): lifted column j is ``[x_j; x_{j+s}; ...; x_{j+(d-1)s}]`` for
  ``d = count`` copies and spacing ``s``: block 0 is the earliest snapshot, and lifted
  column j carries the time of snapshot j. :func:`delay_columns` plans which source
  snapshots feed each block so that no window crosses a run boundary; the reader then
  gathers ``X[:, plan[b]]`` for block b. :func:`hankel` does the same in memory.

Consecutive lifted columns of one run are still one step ``dt`` apart, so the lifted
runs have :func:`delayed_run_lengths` snapshots and the fit's pair mask follows from
:func:`snaplift.fitting.run_pair_mask` of those lengths.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import ConfigError
from snaplift.lifting._base import positive_int

__all__ = [
    "FieldLift",
    "LiftedField",
    "POINTWISE",
    "pointwise_terms",
    "pointwise_size",
    "delay_columns",
    "delayed_run_lengths",
    "hankel",
]

#: pointwise functions by name
POINTWISE: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "x": lambda v: v.copy(),
    "square": np.square,
    "cube": lambda v: v * v * v,
    "abs": np.abs,
    "sin": np.sin,
    "cos": np.cos,
}


def _functions(functions: Sequence[str]) -> tuple[str, ...]:
    if isinstance(functions, str) or not isinstance(functions, Sequence) or not functions:
        raise ConfigError(
            f"pointwise functions must be a non-empty list of names among {', '.join(POINTWISE)}; "
            f"got {functions!r}"
        )
    for name in functions:
        if name not in POINTWISE:
            raise ConfigError(
                f"pointwise function {name!r} is not available; choose among {', '.join(POINTWISE)}"
            )
    repeated = [n for i, n in enumerate(functions) if n in functions[:i]]
    if repeated:
        raise ConfigError(f"pointwise function {repeated[0]!r} is listed twice")
    return tuple(functions)


def pointwise_size(n_points: int, functions: Sequence[str]) -> int:
    """Rows of the lifted tile: ``len(functions) * n_points``."""
    return len(_functions(functions)) * int(n_points)


def pointwise_terms(values: ArrayLike, functions: Sequence[str]) -> np.ndarray:
    """Pointwise functions of a tile, stacked: (points, m) -> (len(functions) * points, m).

    Block ``f`` (rows ``f * points`` to ``(f + 1) * points``) holds ``functions[f]``
    applied to every entry. Names: ``"x"``, ``"square"``, ``"cube"``, ``"abs"``,
    ``"sin"``, ``"cos"``. Accumulation type: float64 (complex128 for complex input).

    Examples
    --------
    >>> pointwise_terms(np.array([[2.0, -1.0]]), ["x", "square", "abs"]).tolist()
    [[2.0, -1.0], [4.0, 1.0], [2.0, 1.0]]
    """
    names = _functions(functions)
    tile = np.asarray(values)
    if tile.ndim != 2:
        raise ConfigError(f"a tile must be 2-D (points x snapshots); got shape {tile.shape}")
    if not np.issubdtype(tile.dtype, np.number) or np.issubdtype(tile.dtype, np.bool_):
        raise ConfigError(f"a tile must hold numbers; got dtype {tile.dtype}")
    tile = tile.astype(np.complex128 if np.iscomplexobj(tile) else np.float64, copy=False)
    out = np.empty((len(names) * tile.shape[0], tile.shape[1]), dtype=tile.dtype)
    for block, name in enumerate(names):
        out[block * tile.shape[0] : (block + 1) * tile.shape[0]] = POINTWISE[name](tile)
    return out


def _run_lengths(run_lengths: ArrayLike) -> np.ndarray:
    lengths = np.atleast_1d(np.asarray(run_lengths))
    if lengths.ndim != 1 or lengths.size == 0 or not np.issubdtype(lengths.dtype, np.integer):
        raise ConfigError(f"run_lengths must be a non-empty list of integers; got {run_lengths!r}")
    bad = np.flatnonzero(lengths < 1)
    if bad.size:
        raise ConfigError(
            f"run_lengths[{bad[0]}] is {lengths[bad[0]]}; every run needs >= 1 snapshot"
        )
    return lengths.astype(np.int64)


def delayed_run_lengths(run_lengths: ArrayLike, count: int, spacing: int = 1) -> np.ndarray:
    """Lifted snapshots per run: ``length - (count - 1) * spacing``.

    Raises
    ------
    ConfigError
        If a run is too short for one full window.
    """
    lengths = _run_lengths(run_lengths)
    copies = positive_int(count, "delays count")
    step = positive_int(spacing, "delays spacing")
    span = (copies - 1) * step
    short = np.flatnonzero(lengths <= span)
    if short.size:
        run = short[0]
        raise ConfigError(
            f"run {run} has {lengths[run]} snapshots but delays with count {copies} and spacing "
            f"{step} need windows of {span + 1}; lower the count or the spacing "
            f"(a run of L snapshots allows count <= (L - 1) / spacing + 1)"
        )
    return lengths - span


def delay_columns(run_lengths: ArrayLike, count: int, spacing: int = 1) -> list[np.ndarray]:
    """Source snapshot indices for each delay block; no window crosses a run boundary.

    Parameters
    ----------
    run_lengths : array_like of int
        Snapshots per run, in the order the runs are concatenated (one run: ``[m]``).
    count : int
        Number of delayed copies d (1 = no delay).
    spacing : int
        Steps between copies s.

    Returns
    -------
    list of ndarray (int64)
        ``plan[b][j]`` is the source snapshot of block b of lifted column j, i.e.
        ``plan[b] = plan[0] + b * spacing``; all arrays have ``sum(delayed_run_lengths)``
        entries.

    Examples
    --------
    >>> [p.tolist() for p in delay_columns([4, 3], count=2, spacing=1)]
    [[0, 1, 2, 4, 5], [1, 2, 3, 5, 6]]
    """
    lengths = _run_lengths(run_lengths)
    kept = delayed_run_lengths(lengths, count, spacing)
    starts = np.concatenate(([0], np.cumsum(lengths)[:-1]))
    first = np.concatenate([start + np.arange(n) for start, n in zip(starts, kept, strict=True)])
    return [first + b * int(spacing) for b in range(int(count))]


def hankel(
    matrix: ArrayLike,
    count: int,
    spacing: int = 1,
    run_lengths: ArrayLike | None = None,
) -> np.ndarray:
    """In-memory Hankel stacking of a snapshot matrix (n, m) -> (count * n, m').

    Uses :func:`delay_columns`; ``run_lengths`` defaults to one run of all ``m`` snapshots.

    Examples
    --------
    >>> hankel(np.array([[1.0, 2.0, 3.0, 4.0]]), count=2).tolist()
    [[1.0, 2.0, 3.0], [2.0, 3.0, 4.0]]
    """
    data = np.asarray(matrix)
    if data.ndim != 2:
        raise ConfigError(f"hankel needs a 2-D snapshot matrix (n x m); got shape {data.shape}")
    lengths = [data.shape[1]] if run_lengths is None else run_lengths
    total = int(_run_lengths(lengths).sum())
    if total != data.shape[1]:
        raise ConfigError(
            f"run_lengths add up to {total} snapshots but the matrix has {data.shape[1]} columns"
        )
    plan = delay_columns(lengths, count, spacing)
    return np.concatenate([data[:, columns] for columns in plan], axis=0)


@dataclass(frozen=True)
class LiftedField:
    """One row block of the lifted snapshot matrix: ``term`` of archive field ``source``, delay ``block``."""

    name: str
    source: str
    term: str = "x"
    block: int = 0


@dataclass(frozen=True)
class FieldLift:
    """Observables of the raw fields, fused into the tile read (``lift:`` entries ``pointwise``, ``delays``).

    Parameters
    ----------
    terms : tuple of str
        Pointwise functions (names of :data:`POINTWISE`); ``("x",)`` keeps the field itself.
    fields : tuple of str or None
        Fields the pointwise terms apply to (default: every field); other fields keep ``x``.
    delays : int
        Delayed copies d of every lifted row (1: none).
    spacing : int
        Snapshots between copies s (in selected snapshots).

    The lifted fields are named ``<field>`` for ``x``, ``<field>_<term>`` for other terms
    and ``..._delay<b>`` for delay block ``b >= 1`` (``u_square_delay2``). Each is a field
    of its own downstream: its own RMS scale, basis and modes.

    Examples
    --------
    >>> [f.name for f in FieldLift(terms=("x", "square"), delays=2).lifted(["u"])]
    ['u', 'u_square', 'u_delay1', 'u_square_delay1']
    """

    terms: tuple[str, ...] = ("x",)
    fields: tuple[str, ...] | None = None
    delays: int = 1
    spacing: int = 1

    def __post_init__(self) -> None:
        _functions(list(self.terms))
        positive_int(self.delays, "delays count")
        positive_int(self.spacing, "delays spacing")

    @property
    def is_identity(self) -> bool:
        return self.terms == ("x",) and self.delays == 1

    def lifted(self, fields: Sequence[str]) -> list[LiftedField]:
        """The lifted fields of ``fields`` in row order (field, delay block, term).

        The lifted fields of one archive field are adjacent, so that the tiles that share
        one raw read come one after the other.
        """
        if self.fields is not None:
            unknown = sorted(set(self.fields) - set(fields))
            if unknown:
                raise ConfigError(
                    f"pointwise fields {unknown} are not among the archive fields {list(fields)}"
                )
        out: list[LiftedField] = []
        for name in fields:
            for block in range(int(self.delays)):
                suffix = f"_delay{block}" if block else ""
                terms = self.terms if self.fields is None or name in self.fields else ("x",)
                for term in terms:
                    base = name if term == "x" else f"{name}_{term}"
                    out.append(LiftedField(base + suffix, name, term, block))
        names = [f.name for f in out]
        clash = sorted(set(names) & (set(fields) - {f.name for f in out if f.term == "x" and f.block == 0}))
        repeated = [n for i, n in enumerate(names) if n in names[:i]]
        if clash or repeated:
            raise ConfigError(
                f"lifted field name {(clash or repeated)[0]!r} is also the name of an archive field; "
                "rename the field or lift fewer terms"
            )
        return out

    def columns(self, run_lengths: ArrayLike) -> list[np.ndarray]:
        """Positions (in the selected snapshots) feeding each delay block (:func:`delay_columns`)."""
        return delay_columns(run_lengths, self.delays, self.spacing)

    def apply(self, term: str, values: np.ndarray) -> np.ndarray:
        """``term`` of a raw tile, in place where the function allows it."""
        if term == "x":
            return values
        return POINTWISE[term](values)
