"""report/html: the self-contained HTML report, read back with the standard library's HTML parser."""

from __future__ import annotations

import base64
from html.parser import HTMLParser

import numpy as np
import pytest

from braggstrain.report.figures import FIGURES
from braggstrain.io.results import Results, read_results
from braggstrain.report.html import CAUTIONS, strain_statistics, write_report




class _Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs, self.imgs, self.tables, self.tags = [], 0, 0, set()

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        self.imgs += tag == "img"
        self.tables += tag == "table"
        for k, v in attrs:
            if k in ("src", "href", "srcset", "data", "poster"):
                self.refs.append(v or "")



def test_report_is_self_contained_and_holds_the_tables(bundle, results_file, figures, tmp_path):
    back = read_results(results_file)
    page = write_report(back, tmp_path, figures)
    text = page.read_text(encoding="utf-8")
    parser = _Links()
    parser.feed(text)
    assert parser.refs and all(r.startswith("data:image/png;base64,") for r in parser.refs)
    assert "<link" not in text and "<script" not in text and "url(" not in text
    assert parser.imgs == len(figures)
    # the embedded images are the figure files, byte for byte
    embedded = [base64.b64decode(r.split(",", 1)[1]) for r in parser.refs]
    assert embedded == [p.read_bytes() for p in figures]
    assert parser.tables >= 6
    for x in bundle["reflections"]:
        assert f"<td class=\"text\">{x['name']}</td>" in text
    assert "(1 1 1)" in text and "PRTF resolution" in text and "oversampling" in text
    assert f"{bundle['tensor'].condition_number:.3f}" in text
    d = bundle["dislocations"][0]
    assert "1/2[0 1 -1]" in text and "Burgers vector" in text and f"{d.character_deg:.0f}" in text
    # strain statistics: the median of ε_zz inside the crystal, as numpy computes it
    stats = {s["name"]: s for s in strain_statistics(bundle["tensor"])}
    v = bundle["tensor"].strain[2, 2][bundle["tensor"].support]
    v = v[np.isfinite(v)]
    assert stats["ε_zz"]["p50"] == pytest.approx(float(np.median(v)))
    assert f"{stats['ε_zz']['p50']:.3e}" in text
    assert CAUTIONS.split(".")[0] in text and "facility" in text
    # the pipeline text is shown escaped, never as markup
    assert "<b>not html</b>" not in text and "&lt;b&gt;not html&lt;/b&gt; &amp; more" in text
    assert not [q for q in tmp_path.iterdir() if ".part" in q.name]
    # a PRTF that stays above 1/e is said in words, as in the PRTF figure
    flat = dict(bundle, reflections=[dict(x, prtf=dict(x["prtf"], resolution=np.nan)) for x in bundle["reflections"]])
    text = write_report(Results.from_dict(flat), tmp_path / "flat", []).read_text(encoding="utf-8")
    assert text.count("above 1/e to the q edge") == len(bundle["reflections"])



def test_report_makes_its_own_figures(bundle, tmp_path):
    small = dict(bundle, reflections=[dict(x, history={}, prtf=None, run_metrics=[]) for x in bundle["reflections"]],
                 dislocations=[])
    page = write_report(Results.from_dict(small), tmp_path)
    names = sorted(p.name for p in tmp_path.glob("*.png"))
    # nothing recorded, no empty figure
    expected = sorted(set(FIGURES) - {"prtf.png", "history.png", "runs.png"})
    assert names == expected
    text = page.read_text(encoding="utf-8")
    assert "No dislocation line was found" in text
    assert text.count("<img ") == len(expected)
