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


def link_archive(archive: Path, workflow_dir: Path) -> Path:
    """Make ``workflow_dir/fin-duct.h5`` the demo archive (a symbolic link), where the
    example workflows in ``workflows/`` expect it; an existing file there that is not a link
    to an archive is left alone (error)."""
    from snaplift.errors import ConfigError

    workflow_dir = Path(workflow_dir)
    if not workflow_dir.is_dir():
        raise ConfigError(f"--workflow-dir {workflow_dir} is not a folder; give the folder of the example workflows")
    target = workflow_dir / "fin-duct.h5"
    if target.is_symlink():
        target.unlink()
    elif target.exists():
        if target.resolve() == Path(archive).resolve():
            return target
        raise ConfigError(f"{target} exists and is not a link to the demo archive; remove it or choose another "
                          "--workflow-dir")
    target.symlink_to(Path(archive).resolve())
    return target


def run_demo(
    *, size: str = "default", folder: Path | None = None, progress: Callable[[str], None] | None = None,
    overwrite: bool = False, workflow_dir: Path | None = None,
) -> tuple[Any, Any]:
    """Generate or reuse the demo archive, run the workflow next to it, return (summary, table).

    The workflow is written to ``folder`` (default: the archive's cache folder) with its
    archive and output paths filled in, so the result store's provenance records the
    workflow that actually ran. ``workflow_dir``: also link the archive there as
    ``fin-duct.h5``, where the example workflows of ``workflows/`` expect it.

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
    if workflow_dir is not None:
        link = link_archive(archive, workflow_dir)
        say(f"demo: linked {link} -> {archive}; run the examples there, e.g. "
            f"snaplift run {Path(workflow_dir) / 'fin-duct-lifted.yaml'}")
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
