"""Archives of several runs: RunsReader over member files, run labels, selected runs.

numpy is the reference throughout: a RunsReader must return what slicing the
concatenation (``np.concatenate`` along the snapshot axis) of its members returns.
The data are invented (the duct-with-heated-fin demo scenario, small grids) or plain
synthetic arrays.
"""

from __future__ import annotations

import importlib.util
import pickle
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import zarr

from snaplift.archive import (
    RunsReader,
    open_archive,
    run_lengths_from_labels,
    scan_archive,
    selected_run_lengths,
)
from snaplift.archive.hdf5 import HDF5Reader
from snaplift.archive.matrix import build_snapshot_matrix, read_snapshot_block
from snaplift.errors import ArchiveError, FieldNotFoundError
from snaplift.workflow.fingerprint import archive_fingerprint

# the shared conformance suite, loaded from its file (tests/ is not a package)
_SPEC = importlib.util.spec_from_file_location(
    "snaplift_reader_conformance", Path(__file__).with_name("test_reader_conformance.py")
)
assert _SPEC is not None and _SPEC.loader is not None
conformance = sys.modules.setdefault(_SPEC.name, importlib.util.module_from_spec(_SPEC))
if not hasattr(conformance, "ReaderTests"):
    _SPEC.loader.exec_module(conformance)
reference = conformance.reference  # the session fixture the suite's ``written`` uses


def _x(values: np.ndarray) -> np.ndarray:
    """Snapshot matrix of a field (grid flattened in C order, transposed)."""
    return values.reshape(values.shape[0], -1).T


# ------------------------------------------------------------------ conformance suite
def _split(values: np.ndarray, lengths: list[int]) -> list[np.ndarray]:
    return np.split(values, np.cumsum(lengths)[:-1], axis=0)


class TestRunsOfHDF5(conformance.ReaderTests):
    """The reference archive cut into three HDF5 files, runs of 5, 4 and 3 snapshots."""

    LENGTHS = [5, 4, 3]

    @classmethod
    def write(cls, directory: Path, ref):
        paths = []
        pieces = {name: _split(getattr(ref, name), cls.LENGTHS)
                  for name in ("u", "p", "temperature", "q", "times")}
        for k in range(len(cls.LENGTHS)):
            path = directory / f"case_{k}.h5"
            with h5py.File(path, "w") as f:
                f.create_dataset("u", data=pieces["u"][k], chunks=(3, 3, 5), compression="gzip")
                f.create_dataset("flow/p", data=pieces["p"][k], chunks=(3, 5, 4))
                f.create_dataset("temperature", data=pieces["temperature"][k])  # contiguous
                f.create_dataset("extra/q", data=pieces["q"][k], chunks=(3, 5, 4))
                f.create_dataset("t", data=pieces["times"][k])
                f.create_dataset("weights", data=ref.weights)
                f.create_dataset("mask", data=ref.mask)
            paths.append(str(path))
        return conformance.Written(
            path=paths,  # open_archive(list) is what the suite's reader fixture calls
            reader_cls=RunsReader,
            fields={"u": ref.u, "flow/p": ref.p, "temperature": ref.temperature,
                    "extra/q": ref.q},
            stored={"u": np.dtype("f8"), "flow/p": np.dtype("f8"),
                    "temperature": np.dtype("f4"), "extra/q": np.dtype("c16")},
            chunks={"u": (3, 3, 5), "flow/p": (3, 5, 4), "temperature": (1, 6, 5),
                    "extra/q": (3, 5, 4)},
            variables={"t": ref.times, "weights": ref.weights, "mask": ref.mask},
            time_name="t",
            float32_field="temperature",
            complex_field="extra/q",
        )

    def test_run_lengths_reported(self, reader):
        info = reader.describe()
        assert info.attrs["run_lengths"] == self.LENGTHS
        np.testing.assert_array_equal(reader.run_lengths(), self.LENGTHS)
        assert len(info.files) == 3
        assert info.format == "runs of hdf5"


class TestRunsOfHDF5AndZarr(conformance.ReaderTests):
    """An HDF5 run of 7 snapshots and a zarr v3 run of 5, with other chunk layouts."""

    @staticmethod
    def write(directory: Path, ref):
        first, second = slice(0, 7), slice(7, 12)
        h5 = directory / "case_a.h5"
        with h5py.File(h5, "w") as f:
            f.create_dataset("u", data=ref.u[first], chunks=(4, 3, 5))
            f.create_dataset("flow/p", data=ref.p[first], chunks=(5, 5, 4))
            f.create_dataset("temperature", data=ref.temperature[first], chunks=(7, 6, 5))
            f.create_dataset("q", data=ref.q[first])
            f.create_dataset("t", data=ref.times[first])
            f.create_dataset("weights", data=ref.weights)
            f.create_dataset("mask", data=ref.mask)
        store = directory / "case_b.zarr"
        g = zarr.open_group(str(store), mode="w", zarr_format=3)
        g.create_array("u", shape=(5, 6, 5), chunks=(2, 3, 5), dtype="f8")[:] = ref.u[second]
        g.create_array("flow/p", shape=(5, 5, 4), chunks=(5, 5, 4), dtype="f8")[:] = ref.p[second]
        g.create_array("temperature", shape=(5, 6, 5), chunks=(1, 6, 5),
                       dtype="f4")[:] = ref.temperature[second]
        g.create_array("q", shape=(5, 5, 4), chunks=(3, 5, 4), dtype="c16")[:] = ref.q[second]
        g.create_array("t", shape=(5,), dtype="f8")[:] = ref.times[second]
        g.create_array("weights", shape=(6, 5), dtype="f8")[:] = ref.weights
        g.create_array("mask", shape=(6, 5), dtype="bool")[:] = ref.mask
        return conformance.Written(
            path=[str(h5), str(store)],
            reader_cls=RunsReader,
            fields={"u": ref.u, "flow/p": ref.p, "temperature": ref.temperature, "q": ref.q},
            stored={"u": np.dtype("f8"), "flow/p": np.dtype("f8"),
                    "temperature": np.dtype("f4"), "q": np.dtype("c16")},
            # the first member's layout is reported (contiguous q: one snapshot)
            chunks={"u": (4, 3, 5), "flow/p": (5, 5, 4), "temperature": (7, 6, 5),
                    "q": (1, 5, 4)},
            variables={"t": ref.times, "weights": ref.weights, "mask": ref.mask},
            time_name="t",
            float32_field="temperature",
            complex_field="q",
        )

    def test_differing_chunks_are_listed(self, reader):
        info = reader.describe()
        assert info.fields["u"].attrs["run_chunks"] == [[4, 3, 5], [2, 3, 5]]
        assert "run_chunks" not in info.fields["flow/p"].attrs  # same layout in both
        assert info.format == "runs of hdf5, zarr v3"


# ------------------------------------------------------------------ own member files
def _write_h5(path: Path, u: np.ndarray, *, time: np.ndarray | None = None,
              weights: np.ndarray | None = None, extra: dict[str, np.ndarray] | None = None,
              chunks: tuple[int, ...] | None = None) -> str:
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=u, chunks=chunks)
        f.create_dataset("time", data=np.arange(u.shape[0]) * 0.5 if time is None else time)
        f.create_dataset("weights", data=np.ones(u.shape[1:]) if weights is None else weights)
        for name, values in (extra or {}).items():
            f.create_dataset(name, data=values)
    return str(path)


@pytest.fixture()
def three_runs(tmp_path):
    """Runs of 3, 1 and 4 snapshots of an invented (7, 5) field; times restart per run."""
    rng = np.random.default_rng(11)
    parts = [rng.standard_normal((n, 7, 5)) for n in (3, 1, 4)]
    paths = [_write_h5(tmp_path / f"case_{k}.h5", u, chunks=(1, 7, 5)) for k, u in enumerate(parts)]
    return paths, parts


def test_tiles_match_numpy_concatenation_across_boundaries(three_runs):
    paths, parts = three_runs
    reader = open_archive(paths)
    expected = _x(np.concatenate(parts))  # numpy as the reference
    cases = [
        (slice(None), slice(None)),  # every run
        (slice(4, 30), slice(2, 5)),  # run 0 end, the one-snapshot run 1, run 2 start
        (slice(0, 35), slice(3, 4)),  # exactly run 1
        (slice(10, 11), slice(1, 8)),  # one point across all boundaries
        (slice(6, 9), slice(4, 100)),  # past the end: clipped like numpy
        (slice(6, 9), slice(3, 3)),  # empty
    ]
    for points, snapshots in cases:
        tile = reader.read_tile("u", points, snapshots)
        assert tile.shape == expected[points, snapshots].shape
        assert tile.flags.c_contiguous
        np.testing.assert_array_equal(tile, expected[points, snapshots],
                                      err_msg=f"{points} {snapshots}")


def test_run_slices(three_runs):
    paths, _ = three_runs
    reader = open_archive(paths)  # runs of 3, 1, 4: archive snapshots 0-2 | 3 | 4-7
    assert reader.run_slices(2, 6) == [(0, 2, 3), (1, 0, 1), (2, 0, 2)]
    assert reader.run_slices(3, 4) == [(1, 0, 1)]
    assert reader.run_slices(4, 8) == [(2, 0, 4)]
    assert reader.run_slices(5, 5) == []


def test_describe_totals(three_runs):
    paths, parts = three_runs
    info = open_archive(paths).describe()
    assert info.fields["u"].shape == (8, 7, 5)
    assert info.fields["u"].nbytes == sum(p.nbytes for p in parts)
    assert info.files == tuple(paths)
    assert info.size_bytes == sum(Path(p).stat().st_size for p in paths)
    assert info.attrs["n_snapshots"] == 8
    assert info.attrs["run_lengths"] == [3, 1, 4]
    assert info.variables["time"].shape == (8,)
    assert info.variables["weights"].shape == (7, 5)


def test_time_is_concatenated_and_weights_come_from_the_first_run(three_runs):
    paths, parts = three_runs
    reader = open_archive(paths)
    expected = np.concatenate([0.5 * np.arange(p.shape[0]) for p in parts])
    np.testing.assert_array_equal(reader.read_variable("time"), expected)
    np.testing.assert_array_equal(reader.read_variable("weights"), np.ones((7, 5)))


def test_run_lengths_and_pickle_round_trip(three_runs):
    paths, parts = three_runs
    reader = open_archive(paths)
    np.testing.assert_array_equal(reader.run_lengths(), [3, 1, 4])
    before = reader.read_tile("u", slice(3, 20), slice(1, 6))
    payload = pickle.dumps(reader)
    clone = pickle.loads(payload)
    assert clone == reader and hash(clone) == hash(reader)
    assert len(payload) < 2000  # a descriptor: paths and options, no data
    np.testing.assert_array_equal(clone.read_tile("u", slice(3, 20), slice(1, 6)), before)
    np.testing.assert_array_equal(clone.run_lengths(), [3, 1, 4])


def test_list_of_one_path_opens_that_file(three_runs):
    paths, _ = three_runs
    assert type(open_archive([paths[0]])) is HDF5Reader
    assert type(open_archive((Path(paths[0]), paths[1]))) is RunsReader


def test_bad_lists_are_refused(three_runs, tmp_path):
    paths, _ = three_runs
    with pytest.raises(ArchiveError, match="empty list"):
        open_archive([])
    with pytest.raises(ArchiveError, match="listed twice"):
        open_archive([paths[0], paths[1], paths[0]])
    with pytest.raises(ArchiveError, match="path 1 of the list"):
        open_archive([paths[0], 3])
    with pytest.raises(ArchiveError, match="a file name or a list of them, got set"):
        open_archive({paths[0], paths[1]})
    with pytest.raises(ArchiveError, match="not found"):
        open_archive([paths[0], str(tmp_path / "missing.h5")])
    with pytest.raises(ArchiveError, match="unknown archive format"):
        open_archive(paths, format="nonsense")


def test_snapshot_matrix_through_the_generic_path(three_runs):
    paths, parts = three_runs
    reader = open_archive(paths)
    index = np.array([1, 2, 3, 5, 7])
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=index, snapshot_block=2,
                                   weights="weights")
    block = read_snapshot_block(reader, matrix.fields[0], index, rows=(4, 21))
    # numpy reference: snapshots of the concatenation, flattened grid, unit weights
    expected = np.concatenate(parts).reshape(8, -1)[index][:, 4:21]
    np.testing.assert_array_equal(block, expected)


def test_scan_checks_time_spacing_within_runs(three_runs):
    paths, _ = three_runs
    report = scan_archive(open_archive(paths))
    assert report.run_lengths == (3, 1, 4)
    assert report.n_snapshots == 8 and report.files == 3
    # times restart in every run (0, 0.5, 1.0 | 0 | 0, ...): no step crosses a run
    assert report.spacing is not None and report.spacing.uniform and report.spacing.increasing
    assert report.spacing.dt == 0.5
    assert not any("not increasing" in w for w in report.warnings)
    assert any("run(s) 1 have fewer than 2 snapshots" in w for w in report.warnings)
    assert report.to_dict()["run_lengths"] == [3, 1, 4]


def test_scan_names_a_gap_inside_a_run(tmp_path):
    u = np.zeros((4, 7, 5))
    a = _write_h5(tmp_path / "a.h5", u)
    b = _write_h5(tmp_path / "b.h5", u, time=np.array([0.0, 0.5, 1.5, 2.0]))
    report = scan_archive(open_archive([a, b]))
    assert not report.spacing.uniform
    assert report.spacing.worst_gap_index == 5  # global snapshot 5 -> 6 (b's 1 -> 2)
    assert report.spacing.worst_gap_value == 1.0


def test_fingerprint_lists_every_member(three_runs):
    paths, _ = three_runs
    reader = open_archive(paths)
    first = archive_fingerprint(reader)
    assert first["files"] == 3
    assert first["bytes"] == sum(Path(p).stat().st_size for p in paths)
    assert first["n_snapshots"] == {"u": 8}
    assert archive_fingerprint(open_archive(paths)) == first
    assert archive_fingerprint(open_archive(paths[::-1]))["listing"] != first["listing"]


# ------------------------------------------------------------------ mismatches
def test_missing_field_names_the_file_and_field(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)), extra={"v": np.zeros((3, 7, 5))})
    b = _write_h5(tmp_path / "b.h5", np.zeros((4, 7, 5)))
    with pytest.raises(ArchiveError) as caught:
        open_archive([a, b]).describe()
    message = str(caught.value)
    assert "b.h5" in message and "'v'" in message and "\n" not in message
    with pytest.raises(ArchiveError, match="has field 'v'"):
        open_archive([b, a]).describe()


def test_grid_mismatch_is_named(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)))
    b = _write_h5(tmp_path / "b.h5", np.zeros((3, 7, 6)))
    grid = r"field 'u' has grid \(7, 6\) in run file .*b\.h5 but \(7, 5\)"
    with pytest.raises(ArchiveError, match=grid):
        open_archive([a, b]).read_tile("u", slice(0, 1), slice(0, 1))


def test_dtype_mismatch_is_named(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)))
    b = _write_h5(tmp_path / "b.h5", np.zeros((3, 7, 5), dtype=np.float32))
    with pytest.raises(ArchiveError, match=r"field 'u' is stored as float32 in run file .*b\.h5"):
        open_archive([a, b]).describe()


def test_differing_weights_are_refused(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)))
    b = _write_h5(tmp_path / "b.h5", np.zeros((4, 7, 5)), weights=np.full((7, 5), 2.0))
    reader = open_archive([a, b])
    tile = reader.read_tile("u", slice(None), slice(None))
    np.testing.assert_array_equal(tile, np.zeros((35, 7)))
    with pytest.raises(ArchiveError) as caught:
        reader.read_variable("weights")
    message = str(caught.value)
    assert "'weights'" in message and "a.h5" in message and "b.h5" in message


def test_weights_of_another_shape_are_refused(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)))
    b = _write_h5(tmp_path / "b.h5", np.zeros((4, 7, 5)), weights=np.ones(35))
    reader = open_archive([a, b])
    assert reader.describe().variables["weights"].attrs["runs"] == "differs between run files"
    with pytest.raises(ArchiveError, match=r"'weights' has shape \(35,\) in run file .*b\.h5"):
        reader.read_variable("weights")


def test_variable_missing_in_a_run(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)), extra={"x": np.arange(5.0)})
    b = _write_h5(tmp_path / "b.h5", np.zeros((4, 7, 5)))
    reader = open_archive([a, b])
    assert "x" not in reader.describe().variables
    partial = r"'x' is in run file .*a\.h5 but not in run file .*b\.h5"
    with pytest.raises(ArchiveError, match=partial):
        reader.read_variable("x")
    with pytest.raises(FieldNotFoundError, match="no_such"):
        reader.read_variable("no_such")
    with pytest.raises(ArchiveError, match="is a snapshot field"):
        reader.read_variable("u")


def test_time_units_must_agree(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)))
    b = _write_h5(tmp_path / "b.h5", np.zeros((4, 7, 5)))
    for path, unit in ((a, "seconds since 2000-01-01"), (b, "hours since 2000-01-01")):
        with h5py.File(path, "a") as f:
            f["time"].attrs["units"] = unit
    with pytest.raises(ArchiveError, match="time variable 'time' is in hours in run file"):
        open_archive([a, b]).read_variable("time")


def test_member_grown_after_describe_is_detected(tmp_path):
    a = _write_h5(tmp_path / "a.h5", np.zeros((3, 7, 5)))
    b = tmp_path / "b.h5"
    with h5py.File(b, "w") as f:
        f.create_dataset("u", data=np.zeros((4, 7, 5)), maxshape=(None, 7, 5), chunks=(1, 7, 5))
        f.create_dataset("time", data=np.arange(4.0), maxshape=(None,), chunks=(4,))
    reader = open_archive([str(b), a])
    assert reader.run_lengths().tolist() == [4, 3]
    from snaplift.archive import _handles

    for handle in _handles.cached_handles():  # close the files, keep the parsed layouts
        if isinstance(handle, h5py.File) and handle.id.valid:
            handle.close()
    with h5py.File(b, "a") as f:  # a run file rewritten shorter under the same name
        f["u"].resize((2, 7, 5))
        f["time"].resize((2,))
    with pytest.raises(ArchiveError, match="changed since it was described"):
        reader.read_tile("u", slice(0, 3), slice(1, 5))
    assert reader.describe().attrs["run_lengths"] == [2, 3]  # describe looks again


# ------------------------------------------------------------------ run labels
def test_run_lengths_from_labels():
    labels = np.array([4, 4, 4, 1, 1, 9, 9, 9, 9])
    lengths = run_lengths_from_labels(labels, name="case", path="duct.h5")
    assert lengths.dtype == np.int64
    np.testing.assert_array_equal(lengths, [3, 2, 4])
    # reference: numpy's own run-length count of a contiguous labelling
    _, counts = np.unique(labels, return_counts=True)
    assert sorted(lengths.tolist()) == sorted(counts.tolist())
    np.testing.assert_array_equal(run_lengths_from_labels([0], name="case", path="duct.h5"), [1])


def test_labels_that_come_back_are_refused():
    with pytest.raises(ArchiveError) as caught:
        run_lengths_from_labels(np.array([0, 0, 1, 1, 0, 2]), name="case", path="duct.h5")
    message = str(caught.value)
    assert "'case'" in message and "duct.h5" in message and "snapshot 4" in message
    with pytest.raises(ArchiveError, match="snapshot 5"):
        run_lengths_from_labels([3, 3, 1, 2, 2, 1], name="case", path="duct.h5")


def test_labels_of_wrong_shape_or_type():
    with pytest.raises(ArchiveError, match=r"shape \(2, 3\)"):
        run_lengths_from_labels(np.zeros((2, 3), dtype=int), name="case", path="duct.h5")
    with pytest.raises(ArchiveError, match="has 4 labels; expected 6"):
        run_lengths_from_labels([0, 0, 1, 1], name="case", path="duct.h5", n_snapshots=6)
    with pytest.raises(ArchiveError, match="empty"):
        run_lengths_from_labels(np.array([], dtype=int), name="case", path="duct.h5")
    with pytest.raises(ArchiveError, match="integer run labels"):
        run_lengths_from_labels(np.array(["a", "a", "b"]), name="case", path="duct.h5")
    with pytest.raises(ArchiveError, match="must be finite"):
        run_lengths_from_labels([0.0, np.nan], name="case", path="duct.h5")


# ------------------------------------------------------------------ selected runs
def _count_by_brute_force(lengths, index):
    """Reference: label every snapshot with its run and count the selected ones."""
    labels = np.repeat(np.arange(len(lengths)), lengths)
    runs, counts = np.unique(labels[np.asarray(index)], return_counts=True)
    return counts[np.argsort(runs)]


def test_selected_run_lengths_every_second_snapshot():
    lengths = [5, 4, 3]
    index = np.arange(1, 12, 2)  # start 1, every 2: snapshots 1, 3, 5, 7, 9, 11
    selected = selected_run_lengths(lengths, index)
    np.testing.assert_array_equal(selected, [2, 2, 2])
    np.testing.assert_array_equal(selected, _count_by_brute_force(lengths, index))


def test_selected_run_lengths_drops_runs_left_out():
    lengths = [2, 5, 5]
    index = np.arange(3, 12, 2)  # start 3 skips run 0: 3, 5 | 7, 9, 11
    selected = selected_run_lengths(lengths, index)
    np.testing.assert_array_equal(selected, [2, 3])
    np.testing.assert_array_equal(selected, _count_by_brute_force(lengths, index))
    assert selected.dtype == np.int64
    rng = np.random.default_rng(3)
    lengths = rng.integers(1, 9, size=20)
    index = np.arange(4, int(lengths.sum()) - 3, 3)
    np.testing.assert_array_equal(selected_run_lengths(lengths, index),
                                  _count_by_brute_force(lengths, index))


def test_selected_run_lengths_refuses_bad_selections():
    with pytest.raises(ArchiveError, match="outside the archive's snapshots 0..11"):
        selected_run_lengths([5, 4, 3], [0, 12])
    with pytest.raises(ArchiveError, match="must increase"):
        selected_run_lengths([5, 4, 3], [0, 4, 4])
    with pytest.raises(ArchiveError, match="integers"):
        selected_run_lengths([5.0, 4.0], [0, 1])
