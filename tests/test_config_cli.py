"""Pipeline-file validation and the simulate / inspect commands."""

import numpy as np
import pytest

from braggstrain.cli import main
from braggstrain.config import build_crystal, build_instrument, load_config
from braggstrain.errors import ConfigError
from braggstrain.io.scans import read_scan

from conftest import DEMO, small_toml


def test_demo_pipeline_is_valid():
    cfg = load_config(DEMO)
    assert len(cfg["reflection"]) == 4
    cr = build_crystal(cfg)
    # [111] along sample z (the demo's orientation)
    g = cr.g_sample((1, 1, 1))
    np.testing.assert_allclose(g / np.linalg.norm(g), [0, 0, 1], atol=1e-12)
    inst = build_instrument(cfg)
    assert inst.detector.pixel_size == (75e-6, 75e-6)
    # at least three of the four G are non-coplanar (a 3×3 minor has full rank)
    G = np.array([cr.g_sample(r["hkl"]) for r in cfg["reflection"]])
    assert np.linalg.matrix_rank(G, tol=1e-6) == 3


@pytest.mark.parametrize("edit,key", [
    (lambda t: t.replace("energy_kev = 9.0", "energy_kev = 9.0\nenergy_kv = 9.0"), "did you mean 'energy_kev'"),
    (lambda t: t.replace("energy_kev = 9.0", 'energy_kev = "nine"'), "instrument.energy_kev"),
    (lambda t: t.replace('material = "Pt"', 'material = "Unobtainium"'), "crystal"),
    (lambda t: t.replace("distance_m = 0.25", "distance_m = -0.25"), "instrument.detector.distance_m"),
    (lambda t: t.replace("hkl = [1, 1, 1]", "hkl = [1, 1]"), "reflection[0].hkl"),
    (lambda t: t.replace('axis = "x+"', 'axis = "q+"', 1), "sample_circles[0].axis"),
])
def test_config_errors_name_the_key(tmp_path, edit, key):
    p = tmp_path / "bad.toml"
    p.write_text(edit(small_toml()))
    with pytest.raises(ConfigError) as e:
        cfg = load_config(p)
        build_crystal(cfg)
    assert key in str(e.value) and str(p) in str(e.value)


def test_not_toml(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[crystal\nmaterial = ")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(p)


def test_simulate_and_inspect(tmp_path, small_config, capsys):
    out = tmp_path / "sim"
    assert main(["-q", "simulate", str(small_config), "--out", str(out)]) == 0
    scans = sorted((out / "scans").glob("*.h5"))
    assert len(scans) == 4 and (out / "truth.h5").exists() and (out / "pipeline.toml").exists()
    s = read_scan(scans[0])
    assert s.frames.shape == (56, 96, 96) and s.hkl == (1, 1, 1)
    assert main(["inspect", str(scans[0])]) == 0
    text = capsys.readouterr().out
    assert "max counts" in text and "eta" in text
    assert "after preparation" in text and "oversampling" in text
    # `prepare` writes the prepared data of every scan
    assert main(["-q", "prepare", str(out / "pipeline.toml"), "--out", str(tmp_path / "prep")]) == 0
    from braggstrain.io.prepared import read_prepared

    files = sorted((tmp_path / "prep").glob("*_prepared.h5"))
    assert len(files) == 4
    p = read_prepared(files[0])
    assert p.intensity.ndim == 3 and p.mask.shape == p.intensity.shape


def test_simulate_forbidden_reflection_exits_2(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text(small_toml(hkls=((1, 0, 0), (1, 1, 1), (2, 0, 0))))
    assert main(["simulate", str(p), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "reflection[0].hkl" in err and "forbidden" in err


def test_simulated_scan_escaping_output_folder_is_refused(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text(small_toml().replace('scan = "scans/r0.h5"', 'scan = "../escape.h5"'))
    assert main(["simulate", str(p), "--out", str(tmp_path / "o")]) == 2
    assert not (tmp_path / "escape.h5").exists()


def test_demo_dataset_oversampling_is_at_least_two(tmp_path):
    # Phase retrieval needs the crystal's autocorrelation sampled at least at
    # Nyquist, i.e. oversampling σ ≥ 2 along every axis (common practice, no
    # source). One reflection of the demo, simulated and prepared as the
    # demo's pipeline file says.
    from braggstrain.simulate.demo import simulate_experiment
    from braggstrain.pipeline import check_options
    from braggstrain.prepare.scan import prepare_scan

    cfg = load_config(DEMO)
    cfg["reflection"] = cfg["reflection"][:1]
    simulate_experiment(cfg, tmp_path, log=None)
    opts = check_options(dict(cfg, reflection=cfg["reflection"] * 3))
    prep = prepare_scan(tmp_path / cfg["reflection"][0]["scan"], **opts["prepare"])
    assert np.all(prep.oversampling >= 2.0), prep.oversampling


@pytest.mark.parametrize("name", ["", "../x", "a/b", "r.1", "r 1", "x" * 65])
def test_reflection_names_are_checked_by_the_schema(tmp_path, name):
    p = tmp_path / "bad.toml"
    p.write_text(small_toml().replace('name = "r0"', f'name = "{name}"'))
    with pytest.raises(ConfigError, match=r"reflection\[0\]\.name"):
        load_config(p)


def test_reflection_names_default_and_must_be_unique(tmp_path):
    p = tmp_path / "p.toml"
    p.write_text(small_toml(hkls=((1, 1, 1), (2, 0, 0), (1, -1, 1))).replace('name = "r2"\n', ""))
    assert [r["name"] for r in load_config(p)["reflection"]] == ["r0", "r1", "refl_1m11"]
    p.write_text(small_toml().replace('name = "r1"', 'name = "r0"'))
    with pytest.raises(ConfigError, match=r"reflection\[1\]\.name.*unique"):
        load_config(p)


def test_prepare_refuses_a_name_that_leaves_the_output_folder(tmp_path, small_config, capsys):
    # `prepare` builds file names from reflection names: a name such as
    # ../x would write outside --out; the schema refuses it for every command.
    sim = tmp_path / "sim"
    assert main(["-q", "simulate", str(small_config), "--out", str(sim)]) == 0
    p = sim / "pipeline.toml"
    p.write_text(p.read_text().replace('name = "r0"', 'name = "../x"'))
    assert main(["-q", "prepare", str(p), "--out", str(sim / "prep")]) == 2
    assert "reflection[0].name" in capsys.readouterr().err
    assert not list(tmp_path.rglob("*_prepared.h5"))


@pytest.fixture(scope="module")
def small_sim(tmp_path_factory):
    d = tmp_path_factory.mktemp("small-sim")
    (d / "small.toml").write_text(small_toml())
    assert main(["-q", "simulate", str(d / "small.toml"), "--out", str(d / "sim")]) == 0
    return d / "sim"


def _prepared_mask_counts(folder):
    from braggstrain.io.prepared import read_prepared

    return {p.name: read_prepared(p).mask_counts for p in sorted(folder.glob("*_prepared.h5"))}


def test_reflection_mask_reaches_preparation(small_sim, tmp_path):
    # [[reflection]] mask is added to the scan's own mask (issue 11: it was
    # accepted by the schema and then dropped).
    text = (small_sim / "pipeline.toml").read_text()
    cfg = tmp_path / "p.toml"
    (tmp_path / "scans").symlink_to(small_sim / "scans")
    mask = np.zeros((96, 96), bool)
    mask[10:14, :] = True  # four rows
    np.save(tmp_path / "rows.npy", mask)
    cfg.write_text(text.replace('scan = "scans/r0.h5"', 'scan = "scans/r0.h5"\nmask = "rows.npy"'))
    plain = tmp_path / "plain.toml"
    plain.write_text(text)
    assert main(["-q", "prepare", str(plain), "--out", str(tmp_path / "a")]) == 0
    assert main(["-q", "prepare", str(cfg), "--out", str(tmp_path / "b")]) == 0
    a, b = _prepared_mask_counts(tmp_path / "a"), _prepared_mask_counts(tmp_path / "b")
    # four rows, less the two gap columns (70, 71) the scan masks already
    assert b["r0_prepared.h5"]["scan_mask"] == a["r0_prepared.h5"]["scan_mask"] + 4 * (96 - 2)
    assert b["r1_prepared.h5"] == a["r1_prepared.h5"]


def test_prepare_paths_resolve_against_the_pipeline_file(small_sim, tmp_path, monkeypatch):
    # [prepare] user_mask (and dark, flat) name files next to the pipeline
    # file, wherever the command runs from.
    folder = tmp_path / "exp"
    folder.mkdir()
    (folder / "scans").symlink_to(small_sim / "scans")
    um = np.zeros((96, 96), bool)
    um[:, 5:8] = True
    np.save(folder / "um.npy", um)
    np.save(folder / "dark.npy", np.zeros((96, 96), np.float32))
    text = (small_sim / "pipeline.toml").read_text()
    (folder / "p.toml").write_text(text + '\n[prepare]\nuser_mask = "um.npy"\ndark = "dark.npy"\n'
                                   if "[prepare]" not in text else
                                   text.replace("[prepare]", '[prepare]\nuser_mask = "um.npy"\ndark = "dark.npy"'))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    assert main(["-q", "prepare", str(folder / "p.toml"), "--out", "prep"]) == 0
    counts = _prepared_mask_counts(elsewhere / "prep")
    assert all(c["user_mask"] == 3 * 96 for c in counts.values())
