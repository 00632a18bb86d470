"""The one atomic writer, the one version marker, and readers that never unpickle."""

import os
import pickle

import h5py
import numpy as np
import pytest

from braggstrain.errors import FileFormatError, InputError
from braggstrain.io.arrays import read_array
from braggstrain.io.checkpoints import load_tree, save_tree
from braggstrain.io.files import (atomic_path, mark_version, open_versioned, read_versioned_json, write_atomic,
                                  write_versioned_json)


class _Trap:
    """Unpickling this creates a file: proof that something unpickled it."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


def test_atomic_writer_leaves_nothing_on_failure(tmp_path):
    target = tmp_path / "sub" / "f.txt"
    write_atomic(target, "first")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_text("half")
            raise RuntimeError("interrupted")
    assert target.read_text() == "first"
    assert os.listdir(target.parent) == ["f.txt"]


def test_version_marker_is_checked(tmp_path):
    p = tmp_path / "a.h5"
    with h5py.File(p, "w") as f:
        mark_version(f, "braggstrain-test", 2)
    with open_versioned(p, "braggstrain-test", (1, 2)) as f:
        assert f.attrs["format_version"] == 2
    with pytest.raises(FileFormatError, match="format_version.*expected 1"):
        open_versioned(p, "braggstrain-test", 1)
    with pytest.raises(FileFormatError, match="'@format'.*expected 'braggstrain-other'"):
        open_versioned(p, "braggstrain-other", 2)
    with pytest.raises(FileFormatError, match="file not found"):
        open_versioned(tmp_path / "missing.h5", "braggstrain-test", 2)
    # a file from before the marker, read through its legacy attributes
    old = tmp_path / "old.h5"
    with h5py.File(old, "w") as f:
        f.attrs["content"] = "old thing"
        f.attrs["layout_version"] = 1
    with open_versioned(old, "braggstrain-test", (1, 2), legacy=("content", "old thing", "layout_version")):
        pass
    j = tmp_path / "a.json"
    write_versioned_json(j, "braggstrain-test", 1, {"x": 3})
    assert read_versioned_json(j, "braggstrain-test", 1)["x"] == 3
    with pytest.raises(FileFormatError, match="format_version"):
        read_versioned_json(j, "braggstrain-test", 2)


def test_nothing_read_is_unpickled(tmp_path):
    # A pickle that would create a file when loaded, hidden in the places a
    # user's or an earlier run's files reach: a numpy mask file, a checkpoint
    # and a results-file attribute. Every reader refuses or returns it as data.
    marker = tmp_path / "unpickled"
    trap = np.empty(1, dtype=object)
    trap[0] = _Trap(marker)
    np.save(tmp_path / "mask.npy", trap, allow_pickle=True)
    with pytest.raises(InputError, match="not readable"):
        read_array(str(tmp_path / "mask.npy"), "user_mask", "test")
    blob = np.void(pickle.dumps(_Trap(marker)))
    ck = tmp_path / "ck.h5"
    save_tree(ck, {"a": np.zeros(3)})
    with h5py.File(ck, "a") as f:
        f.attrs["payload"] = blob
        f["a"].attrs["payload"] = blob
    tree, attrs = load_tree(ck)
    assert isinstance(attrs["payload"], (bytes, np.void))
    assert not marker.exists()
