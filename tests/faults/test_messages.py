"""Issue 11, items 8 and 9: one line where a traceback was; inputs accepted with a word; clear messages."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
import zarr

from snaplift.lifting.expressions import parse_formula


def _edmd_with(faults, formula: str):
    return faults.workflow(fit={"method": "edmd", "rank": 4},
                           lift=[{"kind": "expressions", "formulas": {"q": formula}}])


@pytest.mark.parametrize("formula, named", [
    ("1" + "0" * 400 + " * c0", "too large for a float"),
    ("sin(*c0)", "argument unpacking (*) is not allowed"),
    ("c0 * c9", "unknown name 'c9'"),
])
def test_formula_errors_at_validation(faults, formula: str, named: str) -> None:
    archive = faults.hdf5()
    before = faults.hashes(archive)
    outcome = faults.cli("run", _edmd_with(faults, formula))
    faults.one_line_error(outcome, "lift", "'q'", named)
    assert faults.hashes(archive) == before
    assert not (faults.folder / "r.zarr.staging").exists()  # refused before anything was read


def test_a_long_sum_is_not_too_deep() -> None:
    text = " + ".join(f"c{i}" for i in range(100)) + " - 1"
    values = {f"c{i}": np.arange(3.0) * i for i in range(100)}
    # reference: numpy's sum over the same values, minus 1 (4950 = 0 + 1 + ... + 99)
    np.testing.assert_allclose(parse_formula("s", text).evaluate(values), np.arange(3.0) * 4950 - 1)


def test_zero_weights_are_counted_and_all_zero_is_refused(faults) -> None:
    weights = np.ones((6, 8))
    weights[0, :3] = 0.0
    faults.hdf5(w=weights, z=np.zeros((6, 8)))
    run = faults.cli("run", _weighted(faults, "w"))
    assert run.code == 0, run.stderr
    assert any("zero at 3 of 48 kept points" in w for w in zarr.open_group(
        str(faults.folder / "r.zarr"), mode="r").attrs["warnings"])
    before = faults.hashes(faults.folder / "a.h5")
    outcome = faults.cli("run", _weighted(faults, "z", output="z.zarr"))
    faults.one_line_error(outcome, "weights 'z'", "zero at every kept point", "field 'u'")
    assert faults.hashes(faults.folder / "a.h5") == before
    faults.no_complete_store(faults.folder / "z.zarr")


def _weighted(faults, name: str, output: str = "r.zarr"):
    workflow = faults.workflow(output=output, name=f"{name}.yaml")
    import yaml

    data = yaml.safe_load(workflow.read_text())
    data["archive"]["weights"] = name
    workflow.write_text(yaml.safe_dump(data))
    return workflow


def test_integer_and_complex_fields_are_said(faults) -> None:
    u = faults.data()
    with h5py.File(faults.folder / "i.h5", "w") as h5:
        h5["u"] = np.round(100 * u).astype(np.int16)
        h5["t"] = 0.1 * np.arange(24)
    with h5py.File(faults.folder / "c.h5", "w") as h5:
        h5["u"] = u + 1j * np.roll(u, 1, axis=0)
        h5["t"] = 0.1 * np.arange(24)
    for name, said in (("i.h5", "converted to float64"), ("c.h5", "complex")):
        output = name.replace(".h5", ".zarr")
        outcome = faults.cli("run", faults.workflow(f"{name}.yaml", archive=name, output=output))
        assert outcome.code == 0, outcome.stderr
        warnings = zarr.open_group(str(faults.folder / output), mode="r").attrs["warnings"]
        assert any(said in w and "field 'u'" in w for w in warnings), warnings


def test_lease_lost_while_suspended_stops_with_one_line(faults) -> None:
    archive = faults.hdf5()
    workflow = faults.workflow()
    env = {**os.environ, "SNAPLIFT_FAULT": "compress:1:STOP", "PYTHONWARNINGS": "ignore"}
    process = subprocess.Popen([sys.executable, "-m", "snaplift.cli", "run", str(workflow), "-q"], env=env,
                               cwd=faults.folder, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        for _ in range(600):  # until it stops itself (a hang guard, not a timing check)
            with open(f"/proc/{process.pid}/stat") as handle:
                if handle.read().split(") ")[1].startswith("T"):
                    break
            time.sleep(0.1)
        else:
            pytest.fail("the run never reached its stop point")
        # another (live) run takes the lease over, as after a missed heartbeat
        lease = faults.folder / "r.zarr.lease"
        record = {"host": socket.gethostname(), "pid": os.getpid(), "token": "another-run", "beat": time.time(),
                  "interval": 10.0, "started": time.time(), "store": str(faults.folder / "r.zarr")}
        lease.write_text(json.dumps(record))
        before = faults.hashes(archive, lease)
        os.kill(process.pid, signal.SIGCONT)
        stdout, stderr = process.communicate(timeout=300)
    finally:
        if process.poll() is None:
            process.kill()
    from types import SimpleNamespace

    faults.one_line_error(SimpleNamespace(code=process.returncode, stderr=stderr), "lease", "taken over")
    assert faults.hashes(archive, lease) == before  # the other run's lease is left as it is
    faults.no_complete_store(faults.folder / "r.zarr")


def test_lease_takeover_warning_is_one_line_without_source(faults) -> None:
    faults.hdf5()
    workflow = faults.workflow()
    lease = faults.folder / "r.zarr.lease"
    # a lease of a process that is gone (pid 2**22 + 1 is above Linux's default pid_max)
    lease.write_text(json.dumps({"host": socket.gethostname(), "pid": 2**22 + 1, "token": "dead", "beat": 0.0,
                                 "interval": 10.0, "started": 0.0}))
    outcome = faults.subprocess("run", workflow)
    assert outcome.code == 0, outcome.stderr
    text = outcome.stdout + outcome.stderr
    assert "took over the lease" in text
    assert "lease.acquire()" not in text and "RuntimeWarning" not in text


def test_compress_progress_reaches_100_percent_only_at_the_end(faults) -> None:
    faults.hdf5()
    log = faults.folder / "run.log"
    outcome = faults.cli("run", faults.workflow(), "-q", "--log", log)
    assert outcome.code == 0, outcome.stderr
    import re

    lines = [line for line in log.read_text().splitlines() if re.search(r"compress: \d+ % \(", line)]
    totals = {int(re.search(r"of (\d+) units", line).group(1)) for line in lines}
    # randomized, q = 1: 4 passes (Halko et al. 2011: 2 + 2q), every pass's tiles announced up front
    assert len(totals) == 1, lines
    assert sum("compress: 100 %" in line for line in lines) == 1 and "100 %" in lines[-1]
    assert totals.pop() % 4 == 0


def test_unknown_name_in_a_formula_on_the_state_is_caught_before_compress(faults) -> None:
    with h5py.File(faults.folder / "probe.h5", "w") as h5:
        u = faults.data()
        h5["p"] = u[:, 0, :2]  # two probes: variables p_0, p_1
        h5["t"] = 0.1 * np.arange(24)
    workflow = faults.workflow(archive="probe.h5", fit={"method": "edmd", "rank": 3},
                               lift=[{"kind": "expressions", "on": "state", "formulas": {"q": "p_0 * p_7"}}])
    import yaml

    data = yaml.safe_load(workflow.read_text())
    data["archive"]["fields"] = ["p"]
    workflow.write_text(yaml.safe_dump(data))
    outcome = faults.cli("run", workflow)
    faults.one_line_error(outcome, "lift[0]", "unknown name 'p_7'", "p_0, p_1")
    faults.no_complete_store(faults.folder / "r.zarr")
