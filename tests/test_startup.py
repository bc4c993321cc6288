"""What a run imports before it needs it: the command line and the runner stay light.

Not timed (pass/fail tests never depend on wall time): each check names the module that
must not be imported eagerly; a fresh interpreter shows what an import pulls in.
"""

from __future__ import annotations

import subprocess
import sys

import pytest


def _imported_after(statement: str) -> set[str]:
    code = f"import sys; {statement}; print('\\n'.join(sorted(sys.modules)))"
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout
    return set(out.split())


def test_the_command_line_imports_no_numerics():
    modules = _imported_after("import snaplift.cli")
    # cli.py is thin: heavy imports live inside the commands, so --help is fast
    assert not modules & {"numpy", "dask", "zarr", "h5py", "scipy"}


@pytest.mark.parametrize("heavy", ["dask.array", "distributed", "pandas", "xarray", "scipy.optimize"])
def test_the_runner_imports_no_lazy_array_machinery(heavy):
    # dask.array pulls in xarray and pandas (~0.3-0.5 s); a run builds a lazy array only
    # for a large stored basis, and a distributed client only for worker processes
    assert heavy not in _imported_after("import snaplift.workflow.runner")


@pytest.mark.parametrize("heavy", ["xarray", "pandas", "scipy.linalg", "dask"])
def test_the_report_imports_no_xarray_or_scipy(heavy):
    # the report reads a small store straight from zarr; xarray and pandas were a third of
    # a small run's report, scipy.linalg a fifth (the report helper imports this beside a run)
    assert heavy not in _imported_after("import snaplift.report.page; import snaplift.report.helper")


@pytest.mark.parametrize("heavy", ["dask", "scipy", "jinja2", "matplotlib"])
def test_the_runner_imports_no_dask_or_scipy(heavy):
    # a threaded run never builds a dask collection (the streaming compress has threads of
    # its own) and scipy.linalg serves the fit, after compress: neither is imported before
    assert heavy not in _imported_after("import snaplift.workflow.runner")


#: run in a fresh interpreter: ``snaplift run WORKFLOW --quiet`` with the runner's compress
#: callable wrapped: it prints the modules imported before compress, then those compress
#: imported, and the process ends there
_AROUND_COMPRESS = """
import os, sys
import snaplift.cli as cli
import snaplift.workflow.runner as runner

compress = runner._compress_with_retries

def around(context, checkpoint_dir):
    before = set(sys.modules)
    print(" ".join(sorted(before)), flush=True)
    compress(context, checkpoint_dir)
    print(" ".join(sorted(set(sys.modules) - before)), flush=True)
    os._exit(0)

runner._compress_with_retries = around
sys.argv = ["snaplift", "run", sys.argv[1], "--quiet"]
cli.main()
"""


def _around_compress(folder, method: str) -> tuple[set[str], set[str]]:
    import h5py
    import numpy as np
    import yaml

    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = 0.1 * np.arange(24)
        h5.create_dataset("u", data=np.random.default_rng(1).standard_normal((24, 5, 6)), chunks=(1, 5, 6))
    workflow = folder / "w.yaml"
    workflow.write_text(yaml.safe_dump({"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                                        "compress": {"method": method, "rank": 3, "memory": "2GiB"},
                                        "output": {"path": "r.zarr", "report": False},
                                        "cluster": {"kind": "threads", "workers": 2}}))
    done = subprocess.run([sys.executable, "-c", _AROUND_COMPRESS, str(workflow)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    before, during = (done.stdout.split("\n") + ["", ""])[:2]
    return set(before.split()), set(during.split())


@pytest.mark.parametrize("method", ["sketch", "randomized", "tsqr"])
def test_a_run_reaches_compress_without_dask_or_a_console(tmp_path, method):
    before, during = _around_compress(tmp_path, method)
    assert "snaplift.workflow.stages" in before and "h5py" in before  # it did get as far as compress
    # a threaded run builds no dask collection; --quiet shows nothing; the fit's package waits for the fit
    for heavy in ("dask", "distributed", "xarray", "matplotlib", "rich.console", "snaplift.fitting"):
        assert heavy not in before, heavy
    # the memory plan measured this process with every library compress then loads (scipy's
    # sparse and linalg modules hold ~20 MiB): compress imports none the baseline lacked
    assert not {m for m in during if m.split(".")[0] in ("scipy", "dask", "distributed")}, sorted(during)[:10]
