"""A cost model of the compress stage, measured on this machine and scaled on paper.

Per pass over an archive of ``B`` bytes split evenly over ``N`` nodes (each reads its own
file regions, as the tiles are planned):

- read time ``t_read = (B / N) / b``, ``b`` the read bandwidth of one node;
- arithmetic ``t_arith = (B / N) / 2^30 * a``, ``a`` the seconds per GiB of tiles a node's
  cores spend forming the products (measured here on a warm page cache, where reading is
  a memory copy);
- a pass takes ``max(t_read, t_arith)`` when the next tile is read while the current one is
  multiplied (overlapped), ``t_read + t_arith`` when they take turns;
- bytes over the network per pass: every node sends its partial range product once
  (``n x k`` values) and the co-range columns of its own snapshots (``l x m`` in all):
  ``N * 8 n k + 8 l m``, at the client's link bandwidth ``w``.

The compress stage is ``passes * (pass + network)``; a whole run adds the startup and the
stages after compress (fit, modes, store), measured here. This is the roofline reasoning of
Williams, Waterman & Patterson (2009) applied to one streamed pass: the slower of the
device and the cores sets the pace.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["CostModel", "Prediction", "predict", "relative_gap"]

GIB = 2.0**30


@dataclass(frozen=True)
class CostModel:
    """Measured (or assumed) rates of one node."""

    arithmetic_seconds_per_gib: float  # a
    read_bandwidth: float  # b, bytes per second per node
    network_bandwidth: float = 1.25e9  # w, bytes per second at the client (10 Gbit/s Ethernet)
    overlapped: bool = True


@dataclass(frozen=True)
class Prediction:
    read_seconds: float  # per pass, per node
    arithmetic_seconds: float  # per pass, per node
    network_bytes: float  # per pass
    network_seconds: float  # per pass
    compress_seconds: float  # all passes
    whole_seconds: float  # compress + fixed costs


def predict(model: CostModel, archive_bytes: float, *, nodes: int = 1, passes: int = 1, points: int,
            snapshots: int, range_width: int, corange_width: int, fixed_seconds: float = 0.0) -> Prediction:
    """The model's compress and whole-run time (see the module docstring).

    Example
    -------
    >>> p = predict(CostModel(2.0, 1e9), 2**30 * 32, nodes=32, points=1000, snapshots=10,
    ...             range_width=10, corange_width=20)
    >>> round(p.read_seconds, 4), p.arithmetic_seconds, p.network_bytes
    (1.0737, 2.0, 2561600.0)
    """
    per_node = archive_bytes / nodes
    read = per_node / model.read_bandwidth
    arithmetic = per_node / GIB * model.arithmetic_seconds_per_gib
    one_pass = max(read, arithmetic) if model.overlapped else read + arithmetic
    network_bytes = nodes * 8.0 * points * range_width + 8.0 * corange_width * snapshots
    network = network_bytes / model.network_bandwidth if nodes > 1 else 0.0
    compress = passes * (one_pass + network)
    return Prediction(read, arithmetic, network_bytes, network, compress, compress + fixed_seconds)


def relative_gap(predicted: float, measured: float) -> float:
    """``(predicted - measured) / measured``: +0.2 means the model says 20 % too long."""
    return (predicted - measured) / measured
