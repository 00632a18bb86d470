"""report/figures: every figure a valid PNG (read back with Pillow), colour limits, the documented list."""

from __future__ import annotations


from pathlib import Path

import numpy as np
import pytest

from braggstrain.simulate import forward as fw
from braggstrain.report.figures import FIGURES, plot_slices


from results_bundle import N, VS


def test_every_figure_is_a_valid_png(figures):
    from PIL import Image

    assert [p.name for p in figures] == list(FIGURES)
    for p in figures:
        # PNG signature: W3C PNG Specification, 2nd ed. (2003), §5.2
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", p
        with Image.open(p) as im:
            im.verify()  # Pillow checks the chunk CRCs
        with Image.open(p) as im:
            assert im.format == "PNG" and min(im.size) >= 300, (p, im.size)
    assert not [q for q in figures[0].parent.iterdir() if ".part" in q.name]



def test_slice_colour_limits_ignore_outliers(tmp_path):
    # robust limits at the 99th percentile inside the support (common practice, no source)
    sup = fw.octahedron((N, N, N), VS, 280.0)
    rng = np.random.default_rng(1)
    f = np.where(sup, rng.normal(0, 1e-3, (N, N, N)), np.nan)
    c = tuple(np.argwhere(sup).mean(axis=0).round().astype(int))
    f[c] = 1.0  # one wild voxel in the central planes
    fig = plot_slices([f], sup, VS, tmp_path / "s.png", names=["ε"], units=[""])
    ims = [a.images[0] for a in fig.axes if a.images]
    assert len(ims) == 3
    lo, hi = ims[0].get_clim()
    assert lo == -hi  # centred on zero
    p99 = np.percentile(np.abs(f[sup]), 99)
    assert hi == pytest.approx(p99 * 1e3, rel=1e-6)  # shown in units of 10⁻³
    assert (tmp_path / "s.png").is_file()



DOC = Path(__file__).resolve().parents[1] / "docs" / "results.md"


def test_documentation_lists_every_figure():
    text = DOC.read_text(encoding="utf-8")
    for name in FIGURES:
        assert f"`{name}`" in text, name
