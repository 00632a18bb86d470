"""report/dislocations: the 3D figure of the lines."""

from __future__ import annotations

import os

import pytest

from braggstrain.defects.lines import Dislocation
from braggstrain.errors import InputError

from defect_cases import VS


def test_figure_is_written(loop_and_lines, tmp_path):
    # PNG signature from the PNG specification (ISO/IEC 15948, section 5.2).
    from braggstrain.report.dislocations import plot_dislocations

    lines, _, sup, *_ = loop_and_lines
    fig = plot_dislocations(lines, sup, VS, tmp_path / "lines.png")
    data = (tmp_path / "lines.png").read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    ax = fig.axes[0]
    assert ax.get_xlabel() == "x (nm)" and ax.get_zlabel() == "z (nm)"
    assert len(ax.get_legend().get_texts()) == len(lines) + 1
    assert "screw" in fig.axes[1].get_ylabel()  # the colour bar of the character
    assert sorted(os.listdir(tmp_path)) == ["lines.png"]
    assert isinstance(lines[0], Dislocation)
    empty = plot_dislocations([], sup, VS, tmp_path / "none.png")
    assert "no dislocation line" in empty.axes[0].get_title()
    with pytest.raises(InputError, match="Dislocation"):
        plot_dislocations([{"points": []}], sup, VS)
