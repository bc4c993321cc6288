"""Issue 11, items 3, 6, 8, 9: bad input and a hostile environment give one line, never a traceback.

Each case runs the command line and checks exit status 2, one line on stderr naming the
path/field/index, the inputs byte-identical before and after, and no complete store.
"""

from __future__ import annotations

import errno
import resource
import subprocess
import sys

import pytest
import zarr

from snaplift.results import fit_output  # the modes stage imports write_modes from here when it writes


def _alias_bomb(levels: int = 9) -> str:
    # the classic nested-alias document (each level 9 references to the previous one)
    text = 'a: &a ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]\n'
    names = "abcdefghijklmnop"
    for previous, name in zip(names[:levels - 1], names[1:levels]):
        text += f"{name}: &{name} [" + ",".join([f"*{previous}"] * 9) + "]\n"
    return text + f"archive: {{path: *{names[levels - 1]}, fields: [u]}}\noutput: {{path: r.zarr}}\n"


def test_yaml_alias_bomb_is_refused_quickly(faults) -> None:
    archive = faults.hdf5()
    workflow = faults.folder / "bomb.yaml"
    workflow.write_text(_alias_bomb())
    assert len(workflow.read_text()) < 700  # the 602-byte file, or near it
    before = faults.hashes(archive, workflow)
    outcome = faults.subprocess("run", workflow, timeout=60)  # a real process: memory and time bounded
    line = faults.one_line_error(outcome, "bomb.yaml", "aliases")
    assert len(line) < 400
    assert faults.hashes(archive, workflow) == before
    faults.no_complete_store(faults.folder / "r.zarr")


def test_oversized_workflow_file_is_refused_with_its_size(faults) -> None:
    workflow = faults.folder / "huge.yaml"
    workflow.write_text("# padding\n" * (5 * 2**20))  # 50 MiB
    outcome = faults.cli("run", workflow)
    faults.one_line_error(outcome, "huge.yaml", str(workflow.stat().st_size), "at most")


def test_a_huge_value_is_not_echoed_whole(faults) -> None:
    faults.hdf5()
    workflow = faults.workflow(fit={"method": "x" * 100_000})
    outcome = faults.cli("run", workflow)
    line = faults.one_line_error(outcome, "fit.method", "more characters")
    assert len(line) < 2500


def test_workflow_text_in_the_store_is_capped(faults) -> None:
    faults.hdf5()
    workflow = faults.workflow()
    workflow.write_text(workflow.read_text() + "#" + "c" * 200_000 + "\n")  # a long comment: valid
    assert faults.cli("run", workflow, "-q").code == 0
    text = zarr.open_group(str(faults.folder / "r.zarr"), mode="r").attrs["workflow"]
    assert len(text) < 70_000 and "sha256 of the whole text" in text


def test_output_inside_a_zarr_archive_is_refused(faults) -> None:
    archive = faults.zarr_archive()
    workflow = faults.workflow(archive="a.zarr", output="a.zarr/result.zarr")
    before = faults.hashes(archive)
    outcome = faults.cli("run", workflow)
    faults.one_line_error(outcome, "a.zarr/result.zarr", "inside the archive")
    assert faults.hashes(archive) == before  # nothing written into the input, not even a lease
    assert sorted(p.name for p in archive.iterdir()) == ["t", "u", "zarr.json"]


def test_a_glob_that_would_match_the_output_is_refused(faults) -> None:
    for k in range(4):
        faults.hdf5(f"s{k}.h5", m=4)
    workflow = faults.workflow(archive="*", output="r.zarr")
    outcome = faults.cli("run", workflow)
    faults.one_line_error(outcome, "glob", "r.zarr")


@pytest.mark.parametrize("output, named", [("/", "'/'"), ("sub/..", "contains the archive")])
def test_output_path_that_is_no_store_path(faults, output: str, named: str) -> None:
    archive = faults.hdf5()
    before = faults.hashes(archive)
    outcome = faults.cli("run", faults.workflow(output=output))
    faults.one_line_error(outcome, "output.path", named)
    assert faults.hashes(archive) == before
    assert not (faults.folder / "sub").exists()  # no empty folder left behind


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EROFS, errno.EFBIG])
def test_write_errors_are_one_line_and_keep_the_previous_store(faults, monkeypatch, code: int) -> None:
    archive = faults.hdf5()
    workflow = faults.workflow()
    assert faults.cli("run", workflow, "-q").code == 0
    store = faults.folder / "r.zarr"
    previous = faults.hashes(store)

    def refuse(*args, **kwargs):
        raise OSError(code, __import__("os").strerror(code), str(store) + ".staging/store.zarr/modes/u/c/0/0/0")

    monkeypatch.setattr(fit_output, "write_modes", refuse)
    before = faults.hashes(archive)
    outcome = faults.cli("run", faults.workflow(fit={"rank": 3}))
    line = faults.one_line_error(outcome, "r.zarr.staging", "output.path")
    assert __import__("os").strerror(code) in line
    assert faults.hashes(archive) == before
    assert faults.hashes(store) == previous  # the previous good store is intact


def test_file_size_limit_is_one_line_in_a_real_process(faults) -> None:
    # EFBIG for real: a file-size limit below what the result store needs (Python ignores SIGXFSZ)
    archive = faults.hdf5()
    workflow = faults.workflow()
    before = faults.hashes(archive)

    def limit() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (1500, 1500))

    done = subprocess.run([sys.executable, "-m", "snaplift.cli", "run", str(workflow), "-q"], capture_output=True,
                          text=True, timeout=300, cwd=faults.folder, preexec_fn=limit)
    from types import SimpleNamespace

    faults.one_line_error(SimpleNamespace(code=done.returncode, stderr=done.stderr), "File too large")
    assert faults.hashes(archive) == before
    faults.no_complete_store(faults.folder / "r.zarr")


def test_huge_rank_names_the_matrix_size(faults) -> None:
    faults.hdf5()
    outcome = faults.cli("run", faults.workflow(compress={"rank": 10**12}))
    line = faults.one_line_error(outcome, "compress.rank = 1000000000000", "48 points", "24 snapshots")
    assert "memory" not in line
