"""``snaplift demo``: make (once) the fin-in-a-duct archive and reduce it with the bundled workflow."""

from __future__ import annotations

from collections.abc import Callable
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from snaplift.demo.fin_duct import ensure_fin_duct, plan_fin_duct

__all__ = ["run_demo", "demo_workflow_text"]


def demo_workflow_text() -> str:
    """The bundled ``fin-duct.yaml`` (identical to ``workflows/fin-duct.yaml``)."""
    return resources.files("snaplift.demo").joinpath("fin-duct.yaml").read_text()


def run_demo(
    *, size: str = "default", folder: Path | None = None, progress: Callable[[str], None] | None = None,
    overwrite: bool = False,
) -> tuple[Any, Any]:
    """Generate or reuse the demo archive, run the workflow next to it, return (summary, table).

    The workflow is written to ``folder`` (default: the archive's cache folder) with its
    archive and output paths filled in, so the result store's provenance records the
    workflow that actually ran.

    Example
    -------
    >>> summary, table = run_demo(size="small")  # doctest: +SKIP
    """
    from snaplift.report.table import render_spectrum
    from snaplift.workflow.runner import run_workflow

    say = progress or (lambda message: None)
    label = plan_fin_duct(size).size
    say(f"demo: archive of size '{label}' (invented data from snaplift's lattice-Boltzmann model)")
    archive = ensure_fin_duct(size)
    say(f"demo: archive {archive}")
    folder = Path(folder) if folder is not None else archive.parent
    folder.mkdir(parents=True, exist_ok=True)
    workflow = yaml.safe_load(demo_workflow_text())
    workflow["archive"]["path"] = str(archive)
    workflow["output"]["path"] = f"results/fin-duct-{label}.zarr"
    header = "# written by `snaplift demo` from the bundled workflows/fin-duct.yaml\n"
    path = folder / f"fin-duct-{label}.yaml"
    path.write_text(header + yaml.safe_dump(workflow, sort_keys=False))
    summary = run_workflow(path, overwrite=overwrite, progress=say)
    return summary, render_spectrum(summary.path, limit=12)
