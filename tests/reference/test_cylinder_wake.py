"""Circular-cylinder wake at Re = 100: DMD shedding frequency against Williamson (1996).

The wake is computed by snaplift's own lattice-Boltzmann solver (:mod:`snaplift.demo.lbm`,
D2Q9 BGK, half-way bounce-back on a staircase cylinder), written to an HDF5 archive and
reduced by the ordinary pipeline (randomized SVD + DMD) through ``run_workflow``. The
reference is Williamson's fit to laminar parallel-shedding measurements,
St = -3.3265 / Re + 0.1816 + 1.6e-4 Re (Williamson 1996, Annu. Rev. Fluid Mech. 28;
valid for roughly 49 < Re < 180, range from memory), i.e. St = 0.1643 at Re = 100.

Setup and why it is an honest comparison with an unconfined cylinder:

- Uniform inflow U at the inlet column and *periodic* top/bottom edges (no walls, so no
  boundary layers and no Poiseuille profile): the far field is U on every side. The
  lateral period H = D / 0.075 makes this a row of cylinders 13.3 D apart, a blockage of
  7.5 %; U is the free-stream (inflow) speed, which is Williamson's reference velocity.
- The cylinder centre sits 10 D behind the inlet: with 5 D the fixed inlet velocity
  raised St by a further 1.5-4 % in trial runs. Trial runs with this solver (D = 12,
  centre 10 D from the inlet, St from zero crossings of a wake probe) gave
  St = 0.1746 / 0.1695 / 0.1672 for D/H = 0.10 / 0.075 / 0.05; D = 20 instead of 12
  changed St by < 1 % (D/H = 0.1, centre 5 D from the inlet). So the excess left here
  (about +3 %) is mostly blockage, and most of the 10 % tolerance is left for the
  lattice itself (staircase wall, BGK), not spent on the domain.
- Ma = U / c_s = 0.1 sqrt(3) = 0.17; U = 0.05 changed St by < 1 % in a trial run.
- Also tried: the two-relaxation-time collision (magic 3/16) gave the same St within
  0.5 % and magic 1/4 diverged, so the solver default (BGK) is used.

The shedding period is about 720 lattice steps; snapshots every 36 steps give 20 per
period, and 8 periods are saved after a 4800-step transient (shedding is triggered by a
transverse velocity kick and a 0.3-cell offset of the cylinder from the lattice
symmetry line). Only a wake window (8 D x 16 D around and behind the cylinder) is
saved, which is common practice for wake modal analysis and keeps the archive small.
"""

from __future__ import annotations

import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from snaplift.demo.lbm import LatticeFlow
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow

REYNOLDS = 100.0
DIAMETER = 12  # lattice cells
SPEED = 0.1  # inflow speed, lattice units
BLOCKAGE = 0.075  # D / H
UPSTREAM = 10  # inlet to cylinder centre, diameters
DOWNSTREAM = 16  # cylinder centre to outlet, diameters
SAVE_EVERY = 36  # lattice steps between snapshots (~20 per shedding period)
N_SNAPSHOTS = 160  # ~8 shedding periods
TRANSIENT = 4800  # lattice steps before the first snapshot
WINDOW = (4, 2, 14)  # saved rows +-4 D about the axis; columns 2 D ahead to 14 D behind


def williamson_strouhal(reynolds: float) -> float:
    """Laminar parallel-shedding Strouhal number, 49 < Re < 180 (Williamson 1996)."""
    return -3.3265 / reynolds + 0.1816 + 1.6e-4 * reynolds


def simulate_cylinder_wake(path: Path) -> dict[str, float]:
    """Run the lattice and write the wake window to ``path`` (HDF5, time-major)."""
    ny = round(DIAMETER / BLOCKAGE)
    nx = (UPSTREAM + DOWNSTREAM) * DIAMETER
    xc, yc = UPSTREAM * DIAMETER + 0.5, ny / 2 + 0.3  # off the lattice symmetry line
    y, x = np.mgrid[:ny, :nx] + 0.5  # cell centres
    solid = (x - xc) ** 2 + (y - yc) ** 2 <= (DIAMETER / 2) ** 2
    viscosity = SPEED * DIAMETER / REYNOLDS
    flow = LatticeFlow(solid, viscosity=viscosity, inlet_velocity=np.full(ny, SPEED))
    # Impulsive start at U everywhere plus a transverse kick behind the cylinder, which
    # starts the shedding within a few periods instead of waiting for round-off to grow.
    kick = 0.1 * SPEED * np.exp(-((x - xc - DIAMETER) ** 2 + (y - yc) ** 2) / DIAMETER**2)
    flow.initialise(np.full(solid.shape, SPEED), kick)

    half, ahead, behind = WINDOW
    rows = slice(round(yc - half * DIAMETER), round(yc + half * DIAMETER))
    cols = slice(round(xc - ahead * DIAMETER), round(xc + behind * DIAMETER))
    window = solid[rows, cols]
    shape = (N_SNAPSHOTS, *window.shape)
    flow.step(TRANSIENT)
    with h5py.File(path, "w") as h5:
        h5["t"] = TRANSIENT + SAVE_EVERY * (np.arange(N_SNAPSHOTS) + 1.0)
        h5["t"].attrs["units"] = "lattice time steps"
        h5["solid"] = window
        u = h5.create_dataset("u", shape=shape, dtype="f4", chunks=(1, *window.shape))
        v = h5.create_dataset("v", shape=shape, dtype="f4", chunks=(1, *window.shape))
        h5.attrs["source"] = "snaplift.demo.lbm lattice-Boltzmann model, not a validated code"
        for index in range(N_SNAPSHOTS):
            flow.step(SAVE_EVERY)
            ux, uy = flow.velocity()
            assert np.isfinite(ux).all(), f"lattice run diverged before snapshot {index}"
            u[index] = ux[rows, cols]
            v[index] = uy[rows, cols]
    steps = TRANSIENT + SAVE_EVERY * N_SNAPSHOTS
    return {"ny": ny, "nx": nx, "window": window.shape, "steps": steps}


def _write_workflow(folder: Path) -> Path:
    workflow = {
        "archive": {"path": "wake.h5", "fields": ["u", "v"], "time": "t", "mask": "solid"},
        "prepare": {"center": False, "scale": "rms"},
        "compress": {
            "method": "randomized",
            "rank": 24,
            "oversample": 10,
            "power_iterations": 2,
            "seed": 0,
        },
        "fit": {"method": "dmd", "rank": 13},
        "output": {"path": "wake.zarr"},
        "cluster": "threads",
    }
    path = folder / "wake.yaml"
    path.write_text(yaml.safe_dump(workflow))
    return path


# 15-35 s (the lattice run is most of it): a long reference check, run by .ci/run's
# second step (`pytest -m slow`).
@pytest.mark.slow
def test_cylinder_wake_strouhal_number_and_harmonic(tmp_path: Path) -> None:
    start = time.perf_counter()
    setup = simulate_cylinder_wake(tmp_path / "wake.h5")
    simulated = time.perf_counter() - start
    summary = run_workflow(_write_workflow(tmp_path))
    spectrum = read_group(summary.path, "spectrum")
    elapsed = time.perf_counter() - start

    frequency, amplitude = spectrum["frequency"], spectrum["amplitude"]
    resolution = 1.0 / (N_SNAPSHOTS * SAVE_EVERY)  # 1 / record length, lattice steps
    # Oscillating = above half a frequency bin (common practice); one of each conjugate
    # pair (f > 0). The store is sorted by amplitude, so the order is the tool's ranking.
    ranked = [k for k in range(frequency.size) if frequency[k] > 0.5 * resolution]
    assert ranked, f"no oscillating mode in {frequency}"
    assert np.all(np.diff(amplitude) <= 1e-12 * amplitude.max()), "spectrum not by amplitude"
    fundamental = frequency[ranked[0]]
    strouhal = fundamental * DIAMETER / SPEED
    reference = williamson_strouhal(REYNOLDS)
    error = (strouhal - reference) / reference
    # The next oscillating mode in the tool's ranking should be the first harmonic: the
    # streamwise velocity on and near the wake axis feels both vortex rows, i.e. twice per
    # shedding period (from memory; it is the strongest harmonic in the trial runs, for
    # fit ranks 9 to 30).
    harmonic = frequency[ranked[1]]
    harmonic_error = abs(harmonic - 2 * fundamental) / (2 * fundamental)
    print(
        f"\ncylinder wake: grid {setup['ny']} x {setup['nx']} (D = {DIAMETER}, "
        f"D/H = {BLOCKAGE}), {setup['steps']} steps, window {setup['window']}, "
        f"{N_SNAPSHOTS} snapshots every {SAVE_EVERY} steps"
        f"\n  St = {strouhal:.4f} vs Williamson {reference:.4f}: error {100 * error:+.2f} %; "
        f"harmonic {harmonic / fundamental:.4f} f1 (error {100 * harmonic_error:.2f} %)"
        "\n  ranked (f D / U, amplitude): "
        + ", ".join(
            f"({frequency[k] * DIAMETER / SPEED:.4f}, {amplitude[k]:.3g})" for k in ranked[:6]
        )
        + f"\n  time: simulation {simulated:.1f} s, total {elapsed:.1f} s"
    )
    # Williamson (1996): St(100) = 0.1643; 10 % covers lattice resolution and blockage.
    assert abs(error) <= 0.10
    # A periodic limit cycle has exact harmonics n f (Fourier series of a periodic signal).
    assert harmonic_error <= 0.02
