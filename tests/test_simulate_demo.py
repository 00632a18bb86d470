"""simulate_experiment: the [simulate] options the accuracy matrix needs reach the scans and the truth."""

import numpy as np
import pytest

from braggstrain.config import load_config
from braggstrain.errors import ConfigError
from braggstrain.io.scans import read_scan
from braggstrain.simulate.demo import read_truth, simulate_experiment

from conftest import small_toml

EXTRA = """
[[simulate.field]]
kind = "interface"
normal = [0.0, 0.0, -1.0]
position_nm = 35.0
strain = 2.0e-3
decay_nm = 15.0
"""


def _simulate(tmp_path, name, text):
    folder = tmp_path / name
    folder.mkdir()
    (folder / "in.toml").write_text(text)
    simulate_experiment(load_config(folder / "in.toml"), folder, log=None)
    return folder


def _signal(folder, name):
    """A simulated scan's counts, its injected hot pixels left out."""
    frames = read_scan(folder / f"scans/{name}.h5").frames.astype(float)
    hot = np.asarray(read_truth(folder / "truth.h5")["reflections"][name]["hot_pixels"], int).reshape(-1, 2)
    frames[:, hot[:, 0], hot[:, 1]] = 0
    return frames


def _signal_max(folder, name):
    return _signal(folder, name).max()


def test_weak_reflection_own_rocking_circle_moved_and_inverted_specimen(tmp_path):
    hkls = ((1, 1, 1), (2, 0, 0))
    base = small_toml(hkls=hkls, frames=40, window=48, extra=EXTRA)
    ref = _simulate(tmp_path, "ref", base)
    text = base.replace('[simulate]\n', '[simulate]\nreflection_peak_counts = { r1 = 1e4 }\n'
                        'offset_nm = [40.0, -25.0, 30.0]\ninvert = true\ncoherence_sigma = [0.3, 1.0, 1.0]\n')
    text = text.replace('hkl = [2, 0, 0]\n', 'hkl = [2, 0, 0]\nrocking_circle = "phi"\n')
    new = _simulate(tmp_path, "new", text)

    a0, a1 = read_scan(ref / "scans/r0.h5"), read_scan(ref / "scans/r1.h5")
    b0, b1 = read_scan(new / "scans/r0.h5"), read_scan(new / "scans/r1.h5")
    # r1 rocked about phi (the scan file says so, and phi steps), r0 about eta as before
    assert (a1.rocking_circle, b1.rocking_circle, b0.rocking_circle) == ("eta", "phi", "eta")
    assert np.ptp(b1.angles["phi"]) > 0 and np.ndim(b1.angles["eta"]) == 0
    # r1 ten times weaker: the brightest expected voxel is set to the peak counts
    # (Poisson noise at 10⁴ counts: 1 %); the blur lowers the brightest voxel
    # of the measured peak, which the scaling puts back at the peak counts
    assert _signal_max(ref, "r1") == pytest.approx(1e5, rel=0.05)
    assert _signal_max(new, "r1") == pytest.approx(1e4, rel=0.05)
    assert _signal_max(new, "r0") == pytest.approx(1e5, rel=0.05)
    # the blur spreads the peak: with the brightest voxel scaled to the same
    # counts, the scan holds more counts in all (measured 1.18×)
    spread = _signal(new, "r0").sum() / _signal(ref, "r0").sum()
    assert spread > 1.1, spread

    ta, tb = read_truth(ref / "truth.h5"), read_truth(new / "truth.h5")
    off = np.array([400.0, -250.0, 300.0])  # Å
    np.testing.assert_allclose(tb["grid"].origin, off)
    np.testing.assert_allclose(ta["grid"].origin, 0.0)
    # the truth is the point-inverted specimen moved by the offset: the same
    # density and strain at t − r as the original at r (D′(r) = D(−r),
    # forward.PlacedField), the line through t − p with −b
    inv = (slice(None, 0, -1),) * 3  # index n//2 + k of one grid ↔ n//2 − k of the other (n even)
    rest = (slice(1, None),) * 3
    np.testing.assert_allclose(tb["density"][rest], ta["density"][inv], atol=1e-6)
    ok = ta["density"][inv] > 0.99
    np.testing.assert_allclose(tb["strain"][(...,) + rest][..., ok], ta["strain"][(...,) + inv][..., ok], atol=2e-5)
    la, lb = ta["lines"][0], tb["lines"][0]
    np.testing.assert_allclose(lb["point"], off - la["point"])
    np.testing.assert_allclose(lb["line"], la["line"])
    np.testing.assert_allclose(lb["burgers"], -la["burgers"])

    # the twin alone: its intensity is the original's exactly, so the scans are
    # the reference's counts bit for bit and only the truth is inverted
    tw = _simulate(tmp_path, "twin", base.replace('[simulate]\n', '[simulate]\ninvert = true\n'))
    for name in ("r0", "r1"):
        np.testing.assert_array_equal(read_scan(tw / f"scans/{name}.h5").frames,
                                      read_scan(ref / f"scans/{name}.h5").frames)
    np.testing.assert_allclose(read_truth(tw / "truth.h5")["lines"][0]["burgers"], -la["burgers"])


def test_peak_counts_of_an_unknown_reflection_is_refused(tmp_path):
    text = small_toml(hkls=((1, 1, 1),)).replace('[simulate]\n', '[simulate]\nreflection_peak_counts = { r7 = 1e4 }\n')
    (tmp_path / "in.toml").write_text(text)
    with pytest.raises(ConfigError, match="reflection_peak_counts.r7"):
        simulate_experiment(load_config(tmp_path / "in.toml"), tmp_path, log=None)
