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
