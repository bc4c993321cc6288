"""The house in layers: a module imports only from layers below its own.

Every ``import`` of ``snaplift`` code in ``src/snaplift`` is read from the source (``ast``,
no import is executed), at module level and inside functions alike: an import hidden in a
function to dodge a cycle is still an import. A module may import from its own component
(``snaplift.archive.scan`` from ``snaplift.archive.matrix``) and from any component of a
layer below; an import upwards, or sideways into another component of the same layer, is a
violation. Today's violations are listed in ``ALLOWED`` (importing module -> imported
module): the test passes with them, fails on any new one, and fails when a listed one has
gone (delete its entry), so the list only shrinks.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

SRC = Path(__file__).resolve().parents[1] / "src"

#: from the top down; each layer is a tuple of components, a component a tuple of module
#: prefixes (a module belongs to the component of its longest matching prefix)
LAYERS: tuple[tuple[tuple[str, ...], ...], ...] = (
    (("snaplift.cli",),),
    (("snaplift.demo",),),
    (("snaplift.workflow",),),
    # the HTML report and the spectrum table read the result store; the runner draws the report
    (("snaplift.report",),),
    (("snaplift.results",), ("snaplift.cluster",)),
    # stream: the tile loop, tasks, checkpoints, the per-tile accumulation slots, the passes of
    # each compress method and the I/O floor measurement -- the code that reads tiles and runs kernels
    (("snaplift.stream",),),
    # archive (readers, planner, snapshot matrix), prepare, linalg kernels, fitting
    (("snaplift.archive",), ("snaplift.prepare",), ("snaplift.linalg",), ("snaplift.fitting",)),
    # dictionaries of observables: pure functions of arrays, used by the read (lifted fields
    # of the snapshot matrix) and by the fit (EDMD's dictionary), so below both
    (("snaplift.lifting",),),
    # units; the compress methods' registry (names, widths, passes, memory terms: plain arithmetic)
    # and the fit methods' registry (names, summaries, needs: plain data)
    (("snaplift.units",), ("snaplift._process_memory",), ("snaplift.compress_methods",), ("snaplift.fit_methods",)),
    (("snaplift.errors",), ("snaplift.__init__",)),
)

#: today's violations, (importing module, imported module); delete an entry once it is fixed
ALLOWED: frozenset[tuple[str, str]] = frozenset({
})


def _module_name(path: Path) -> str:
    parts = path.relative_to(SRC).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _is_module(name: str) -> bool:
    base = SRC.joinpath(*name.split("."))
    return base.with_suffix(".py").is_file() or (base / "__init__.py").is_file()


def _imports(path: Path) -> set[str]:
    """The snaplift modules ``path`` imports anywhere in its body (``from a import b``: ``a.b``
    when ``b`` is a module, else ``a``)."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), filename=str(path))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            for alias in node.names:
                target = f"{base}.{alias.name}"
                found.add(target if _is_module(target) else base)
    return {module for module in found if module == "snaplift" or module.startswith("snaplift.")}


def _place(module: str) -> tuple[int, int]:
    """(layer index from the top, component index) of a snaplift module."""
    module = "snaplift.__init__" if module == "snaplift" else module
    best, length = None, -1
    for index, layer in enumerate(LAYERS):
        for number, component in enumerate(layer):
            for prefix in component:
                if (module == prefix or module.startswith(prefix + ".")) and len(prefix) > length:
                    best, length = (index, number), len(prefix)
    if best is None:
        raise AssertionError(f"{module} is in no layer of LAYERS: place it")
    return best


def _violations() -> set[tuple[str, str]]:
    found = set()
    for path in sorted((SRC / "snaplift").rglob("*.py")):
        importer = _module_name(path)
        layer, component = _place(importer)
        for imported in _imports(path):
            other_layer, other_component = _place(imported)
            if other_layer < layer or (other_layer == layer and other_component != component):
                found.add((importer, imported))
    return found


def test_every_module_has_a_layer():
    for path in (SRC / "snaplift").rglob("*.py"):
        _place(_module_name(path))


def test_imports_only_go_down():
    new = sorted(_violations() - ALLOWED)
    assert not new, "imports up or sideways across the layers (see LAYERS): " + "; ".join(
        f"{a} imports {b}" for a, b in new
    )


def test_the_allow_list_only_shrinks():
    gone = sorted(ALLOWED - _violations())
    assert not gone, "fixed, delete from ALLOWED: " + "; ".join(f"{a} -> {b}" for a, b in gone)


@pytest.mark.parametrize(
    ("source", "expected"),
    [
        ("import snaplift.cluster\n", {"snaplift.cluster"}),
        ("def f():\n    from snaplift.workflow import schema\n", {"snaplift.workflow.schema"}),
        ("from snaplift.archive import open_archive\n", {"snaplift.archive"}),
        ("from .. import units\n", {"snaplift.units"}),
        ("import numpy\n", set()),
    ],
)
def test_the_walk_sees_every_kind_of_import(tmp_path, monkeypatch, source, expected):
    # the checker itself can fail: module-level, function-level and relative imports are read
    package = tmp_path / "snaplift" / "linalg"
    package.mkdir(parents=True)
    for name in ("cluster.py", "units.py", "linalg/__init__.py", "workflow/schema.py", "archive/__init__.py"):
        target = tmp_path / "snaplift" / name
        target.parent.mkdir(parents=True, exist_ok=True)
        target.touch()
    (package / "probe.py").write_text(source)
    monkeypatch.setitem(globals(), "SRC", tmp_path)
    assert _imports(package / "probe.py") == expected


def test_an_upward_import_is_a_violation():
    # cluster (results/cluster layer) importing the workflow schema goes up; the reverse goes down
    assert _place("snaplift.workflow.schema")[0] < _place("snaplift.cluster")[0]
    assert _place("snaplift.linalg._testmatrix")[0] == _place("snaplift.archive.plan")[0]
    assert _place("snaplift.linalg._testmatrix")[1] != _place("snaplift.archive.plan")[1]
    assert _place("snaplift.stream.loop") == _place("snaplift.stream._passes")
    assert _place("snaplift.stream.loop")[0] < _place("snaplift.linalg.sketch")[0]
