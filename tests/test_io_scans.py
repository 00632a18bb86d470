"""Scan files: round trip, and a clear error for every missing or malformed field."""

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from braggstrain.errors import ScanFileError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
from braggstrain.io.scans import read_frame_stack, read_scan, write_scan


def _inst():
    det = Detector(shape=(16, 20), pixel_size=(55e-6, 55e-6), distance=0.8, direct_beam=(8.0, 10.0),
                   gaps=((1, 3, 5),))
    return Diffractometer([Circle("eta", "x+", (-10, 90)), Circle("phi", "z-")], [Circle("delta", "x+")], det, 8.5)


def _write(path, **kw):
    rng = np.random.default_rng(0)
    frames = kw.pop("frames", rng.poisson(5, (6, 16, 20)).astype(np.uint32))
    angles = kw.pop("angles", {"eta": np.linspace(10, 10.05, 6), "phi": 3.0, "delta": 30.0})
    return write_scan(path, frames, angles, "eta", _inst(), mask=np.zeros((16, 20), bool), hkl=(1, 1, 1),
                      material="Pt", **kw), frames, angles


def test_round_trip(tmp_path):
    p, frames, angles = _write(tmp_path / "s.h5")
    s = read_scan(p)
    np.testing.assert_array_equal(s.frames, frames)
    np.testing.assert_allclose(s.angles["eta"], angles["eta"])
    assert s.angles["phi"] == 3.0 and s.hkl == (1, 1, 1) and s.material == "Pt"
    assert s.instrument.to_dict() == _inst().to_dict()
    assert s.rocking_step == pytest.approx(0.01)


def test_atomic_write_keeps_old_file_on_failure(tmp_path):
    p, frames, _ = _write(tmp_path / "s.h5")
    with pytest.raises(KeyError):
        write_scan(p, frames, {"eta": np.zeros(6)}, "eta", _inst())  # missing circles
    np.testing.assert_array_equal(read_scan(p).frames, frames)
    assert [q.name for q in tmp_path.iterdir()] == ["s.h5"]


# Each corruption: (what to do to the file, the field the error must name)
CORRUPTIONS = [
    (lambda f: f.attrs.__setitem__("format", "other"), "@format"),
    (lambda f: f.attrs.__setitem__("format_version", 99), "@format_version"),
    (lambda f: f.__delitem__("frames"), "frames"),
    (lambda f: (f.__delitem__("frames"), f.create_dataset("frames", data=np.zeros((16, 20))))[0], "frames"),
    (lambda f: (f.__delitem__("frames"), f.create_dataset("frames", data=np.full((6, 16, 20), np.nan)))[0], "frames"),
    (lambda f: (f.__delitem__("frames"), f.create_dataset("frames", data=-np.ones((6, 16, 20))))[0], "frames"),
    (lambda f: (f.__delitem__("mask"), f.create_dataset("mask", data=np.zeros((3, 3), np.uint8)))[0], "mask"),
    (lambda f: f["instrument"].attrs.__delitem__("energy_kev"), "energy_kev"),
    (lambda f: f["instrument"].attrs.__setitem__("energy_kev", -3.0), "energy_kev"),
    (lambda f: f["instrument"].attrs.__setitem__("rocking_circle", "omega"), "rocking_circle"),
    (lambda f: (f["instrument/circles"].__delitem__("eta"),
                f["instrument/circles"].create_dataset("eta", data=np.zeros(4)))[0], "instrument/circles/eta"),
    (lambda f: f["instrument/circles/eta"].__setitem__(Ellipsis, np.full(6, 10.0)), "instrument/circles/eta"),
    (lambda f: f["instrument/circles/phi"].attrs.__setitem__("axis", "w+"), "instrument/circles/phi"),
    (lambda f: f["instrument/circles/phi"].attrs.__delitem__("role"), "instrument/circles/phi@role"),
    (lambda f: f["instrument/detector"].attrs.__setitem__("shape", np.array([5, 5])), "instrument/detector@shape"),
    (lambda f: f["instrument/detector"].attrs.__delitem__("distance_m"), "instrument/detector@distance_m"),
    (lambda f: f["instrument"].__delitem__("detector"), "instrument/detector"),
]


@pytest.mark.parametrize("corrupt,field", CORRUPTIONS)
def test_every_malformed_field_is_named(tmp_path, corrupt, field):
    p, _, _ = _write(tmp_path / "s.h5")
    with h5py.File(p, "r+") as f:
        corrupt(f)
    with pytest.raises(ScanFileError) as e:
        read_scan(p)
    assert str(p) in str(e.value) and field in str(e.value)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n_angles=st.integers(0, 12), bad=st.sampled_from(["nan", "len", "ok"]))
def test_angle_arrays_property(tmp_path_factory, n_angles, bad):
    p = tmp_path_factory.mktemp("h") / "s.h5"
    frames = np.ones((6, 16, 20), np.uint16)
    eta = np.linspace(0, 1, n_angles if bad == "len" else 6)
    if bad == "nan":
        eta[0] = np.nan
    write_scan(p, frames, {"eta": eta, "phi": 0.0, "delta": 20.0}, "eta", _inst())
    if bad == "ok" or (bad == "len" and n_angles == 6):
        assert read_scan(p).frames.shape == (6, 16, 20)
    else:
        with pytest.raises(ScanFileError, match="instrument/circles/eta"):
            read_scan(p)


def test_not_hdf5_and_missing(tmp_path):
    bad = tmp_path / "junk.h5"
    bad.write_bytes(b"not an hdf5 file at all")
    with pytest.raises(ScanFileError, match="not a readable HDF5"):
        read_scan(bad)
    with pytest.raises(ScanFileError, match="file not found"):
        read_scan(tmp_path / "absent.h5")


def test_plain_frame_stacks(tmp_path):
    from skimage import io

    rng = np.random.default_rng(2)
    frames = rng.poisson(3, (4, 8, 9)).astype(np.uint16)
    with h5py.File(tmp_path / "stack.h5", "w") as f:
        f["entry/data"] = frames
    np.testing.assert_array_equal(read_frame_stack(tmp_path / "stack.h5", "entry/data"), frames)
    with pytest.raises(ScanFileError, match="dataset not found"):
        read_frame_stack(tmp_path / "stack.h5", "nope")
    d = tmp_path / "tiffs"
    d.mkdir()
    for i, fr in enumerate(frames):
        io.imsave(str(d / f"f{i:03d}.tif"), fr, check_contrast=False)
    np.testing.assert_array_equal(read_frame_stack(d), frames)
    (tmp_path / "empty").mkdir()
    with pytest.raises(ScanFileError, match="TIFF"):
        read_frame_stack(tmp_path / "empty")
