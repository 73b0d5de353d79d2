"""fieldplan.fileio: atomic files, output-folder transactions, plain JSON data."""

import dataclasses
import json
import os

import numpy as np
import pytest

from fieldplan.fileio import (MARKER, OutputExistsError, OutputFolderError, atomic_open, atomic_path, atomic_write,
                              json_safe, output_folder, plain, save_figure, umask_mode)


def test_atomic_write_replaces_whole_file_and_leaves_no_temp(tmp_path):
    p = tmp_path / "a.csv"
    atomic_write(p, "old\n")
    atomic_write(p, "new\n")
    assert p.read_text() == "new\n"
    assert sorted(os.listdir(tmp_path)) == ["a.csv"]
    assert (os.stat(p).st_mode & 0o777) == umask_mode()


def test_failed_write_keeps_the_old_file(tmp_path):
    p = tmp_path / "a.json"
    atomic_write(p, "{}")
    with pytest.raises(RuntimeError), atomic_open(p) as fh:
        fh.write('{"half":')
        raise RuntimeError("writer died")
    assert p.read_text() == "{}"
    assert sorted(os.listdir(tmp_path)) == ["a.json"]


def test_atomic_path_keeps_suffix_for_format_picking_writers(tmp_path):
    p = tmp_path / "arr.npy"
    with atomic_path(p) as tmp:
        assert tmp.endswith(".npy") and os.path.dirname(tmp) == str(tmp_path)
        np.save(tmp, np.arange(3))
    np.testing.assert_array_equal(np.load(p), [0, 1, 2])


def test_save_figure_writes_png(tmp_path):
    from matplotlib.figure import Figure

    fig = Figure()
    fig.add_subplot().plot([0, 1])
    p = save_figure(fig, tmp_path / "f.png", dpi=30)
    assert open(p, "rb").read(8) == b"\x89PNG\r\n\x1a\n"
    assert sorted(os.listdir(tmp_path)) == ["f.png"]


def test_output_folder_transaction(tmp_path):
    out = tmp_path / "res"
    with output_folder(out) as tmp:
        atomic_write(os.path.join(tmp, "a.txt"), "1")
    assert sorted(os.listdir(out)) == [MARKER, "a.txt"]
    with pytest.raises(OutputExistsError):
        with output_folder(out):
            pass
    # a failure inside the block leaves the old folder untouched and no temporary folder behind
    with pytest.raises(ValueError), output_folder(out, force=True) as tmp:
        atomic_write(os.path.join(tmp, "b.txt"), "2")
        raise ValueError("planning failed")
    assert sorted(os.listdir(out)) == [MARKER, "a.txt"]
    assert sorted(os.listdir(tmp_path)) == ["res"]
    with output_folder(out, force=True) as tmp:
        atomic_write(os.path.join(tmp, "b.txt"), "2")
    assert sorted(os.listdir(out)) == [MARKER, "b.txt"]


def test_output_folder_never_replaces_a_users_folder(tmp_path):
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("precious")
    with pytest.raises(OutputFolderError, match="not written by fieldplan"):
        with output_folder(out, force=True):
            pass
    assert (out / "notes.txt").read_text() == "precious"


def test_plain_and_json_safe():
    @dataclasses.dataclass
    class D:
        a: tuple
        b: float

    v = {"x": np.array([1.0, np.nan]), 3: D((np.int64(2), np.bool_(True)), np.float32(0.5))}
    assert plain(v)["3"] == {"a": [2, True], "b": 0.5}
    assert np.isnan(plain(v)["x"][1])
    j = json_safe(v)
    assert j["x"] == [1.0, None]
    assert json.loads(json.dumps(j, allow_nan=False)) == j
    assert type(plain(np.int64(2))) is int and type(plain(np.float64(2))) is float
