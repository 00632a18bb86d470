"""Refuse what is wrong, survive what fails.

Every case gives an exit code and one message and leaves earlier outputs
untouched; most failures are monkeypatched (a full disk, a read-only folder,
a damaged file, a killed parent) rather than made on real disks. The
reference values are physics: |G| = 2π/d and λ = hc/E (CODATA 2018, hc =
12.398 keV·Å), Bragg's law λ = 2d sin θ (any diffraction textbook, e.g. Als-
Nielsen & McMorrow, Elements of Modern X-ray Physics, 2nd ed., 2011, eq. 5.2),
Pt a = 3.9242 Å (xrayutilities' database).
"""

import errno
import importlib
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from braggstrain.cli import main
from braggstrain.config import load_config
from braggstrain.simulate.demo import simulate_experiment

from conftest import ROOT, small_toml

# A tiny phasing plan: these tests check refusals and failures, not accuracy.
TINY = '''
[prepare]
crop = [32, 32, 32]

[phasing]
runs = 2
keep = 1
seed = 3
[[phasing.plan]]
algorithm = "HIO"
iterations = 40
sigma = [2.0, 1.5]
threshold = 0.15
[[phasing.plan]]
algorithm = "ER"
iterations = 20
sigma = [1.5, 1.0]
threshold = 0.2
'''
NO_FILES = '''
[output]
vtk = false
figures = false
report = false
'''


class PhasingStarted(Exception):
    pass


@pytest.fixture(scope="module")
def sim(tmp_path_factory):
    d = tmp_path_factory.mktemp("checks")
    (d / "small.toml").write_text(small_toml() + TINY)
    simulate_experiment(load_config(d / "small.toml"), d / "sim", log=None)
    return d / "sim"


@pytest.fixture(scope="module")
def earlier(sim):
    """A finished run (every output) whose files later failures must not touch."""
    out = sim.parent / "earlier"
    assert main(["-q", "run", str(sim / "pipeline.toml"), "--out", str(out), "--workers", "1"]) == 0
    return out


@pytest.fixture
def no_phasing(monkeypatch):
    """Fail loudly if phase retrieval starts: refusals must come first."""
    import braggstrain.phasing as ph

    def boom(*a, **k):
        raise PhasingStarted("phase retrieval started before the refusal")
    monkeypatch.setattr(ph, "ensemble", boom)


def _snapshot(folder):
    folder = Path(folder)
    return {p.relative_to(folder): (p.stat().st_size, p.stat().st_mtime_ns, p.read_bytes()[:4096])
            for p in folder.rglob("*") if p.is_file()}


def _partials(folder):
    return [p for p in Path(folder).rglob("*") if ".part" in p.name]


def _pipeline(sim, tmp_path, edit, extra=NO_FILES):
    text = edit((sim / "pipeline.toml").read_text()) + extra
    p = sim / f"edited_{abs(hash(text)) % 10**8}.toml"
    p.write_text(text)
    return p


def _run(args, capsys):
    code = main(args)
    cap = capsys.readouterr()
    return code, cap.err.strip(), cap.out


def _one_message(err):
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("braggstrain: "), err
    assert "Traceback" not in err
    return lines[0]


# ---------------------------------------------------------------------------
# wrong answers with exit 0 before: now refused before any work
# ---------------------------------------------------------------------------

def test_unreachable_reflection_is_refused_with_the_energy(sim, tmp_path, capsys, no_phasing):
    # Pt (4 4 4): d = 3.9242/√48 = 0.5664 Å, 2d = 1.1328 Å < λ(9 keV) = 1.3776 Å
    p = _pipeline(sim, tmp_path, lambda t: t.replace("hkl = [0, 0, 2]", "hkl = [4, 4, 4]"))
    out = tmp_path / "out"
    code, err, _ = _run(["run", str(p), "--out", str(out)], capsys)
    msg = _one_message(err)
    assert code == 2
    assert "reflection[3].hkl" in msg and "(4 4 4)" in msg and "unreachable at 9 keV" in msg
    assert "1.3776" in msg and "1.1328" in msg
    assert not (out / "checkpoints").exists()


def test_unreachable_at_the_scan_files_energy(sim, tmp_path, capsys, no_phasing):
    # the pipeline file's energy lets (4 4 4) through only if the scan's 9 keV is ignored
    p = _pipeline(sim, tmp_path, lambda t: t.replace("hkl = [0, 0, 2]", "hkl = [4, 4, 4]")
                  .replace("energy_kev = 9.0", 'energy_kev = 12.0\noverride = "scans"'))
    code, err, _ = _run(["run", str(p), "--out", str(tmp_path / "out")], capsys)
    msg = _one_message(err)
    assert code == 2 and "(4 4 4)" in msg and "unreachable at 9 keV" in msg


def _drop_sample_hkl(src, dst):
    import shutil

    shutil.copy(src, dst)
    with h5py.File(dst, "a") as f:
        del f["sample"].attrs["hkl"]


def test_mislabelled_reflection_is_refused_by_the_measured_peak(sim, tmp_path, capsys, no_phasing):
    # the (2 0 0) scan declared as (2 2 0); the file's own /sample hkl removed
    _drop_sample_hkl(sim / "scans" / "r1.h5", sim / "scans" / "r1_nohkl.h5")
    p = _pipeline(sim, tmp_path, lambda t: t.replace('hkl = [2, 0, 0]\nscan = "scans/r1.h5"',
                                                     'hkl = [2, 2, 0]\nscan = "scans/r1_nohkl.h5"'))
    assert "r1_nohkl" in p.read_text()
    out = tmp_path / "out"
    code, err, _ = _run(["-q", "run", str(p), "--out", str(out)], capsys)
    msg = _one_message(err)
    assert code == 2, msg
    # |G(2 0 0)| of Pt = 2π·2/3.9242 = 3.2023 Å⁻¹, d = 1.9621 Å
    assert "reflection[1]" in msg and "(2 2 0)" in msg
    m = re.search(r"\|Q\| = ([0-9.]+) Å⁻¹ \(d = ([0-9.]+) Å\)", msg)
    assert m, msg
    assert float(m.group(1)) == pytest.approx(3.2023, rel=5e-3)
    assert float(m.group(2)) == pytest.approx(1.9621, rel=5e-3)
    assert "would fit: (2 0 0)" in msg
    assert not (out / "results.h5").exists()


def test_identity_tolerances_are_options(sim, tmp_path, capsys, monkeypatch):
    # both tolerances are pipeline-file options; a check that cannot pass is refused for each
    from braggstrain.geometry.crystal import check_reflection_identity
    from braggstrain.config import build_crystal

    cfg = load_config(sim / "pipeline.toml")
    cr = build_crystal(cfg)
    g = cr.g_sample((2, 0, 0))
    # 0.5 % longer and 1° off: passes the defaults, fails tighter options
    from scipy.spatial.transform import Rotation

    axis = np.cross(g, [0.3, -0.2, 1.0])
    q = Rotation.from_rotvec(np.radians(1.0) * axis / np.linalg.norm(axis)).apply(g) * 1.005
    check_reflection_identity(cr, (2, 0, 0), q, where="r")
    with pytest.raises(Exception, match=r"\|Q\|.*0\.50 % .*tolerance 0\.2 %"):
        check_reflection_identity(cr, (2, 0, 0), q, where="r", q_tolerance=0.002)
    with pytest.raises(Exception, match=r"1\.0° .*tolerance 0\.5°"):
        check_reflection_identity(cr, (2, 0, 0), q, where="r", direction_tolerance_deg=0.5)
    cfg2 = _pipeline(sim, tmp_path, lambda t: t, extra=NO_FILES + "\n[checks]\nq_tolerance = 0.0\n")
    code, err, _ = _run(["-q", "run", str(cfg2), "--out", str(tmp_path / "o")], capsys)
    assert code == 2 and "checks.q_tolerance" in err


def test_declared_hkl_against_the_scan_files_own(sim, tmp_path, capsys, no_phasing):
    p = _pipeline(sim, tmp_path, lambda t: t.replace("hkl = [2, 0, 0]", "hkl = [2, 2, 0]"))
    code, err, _ = _run(["run", str(p), "--out", str(tmp_path / "out")], capsys)
    msg = _one_message(err)
    assert code == 2
    assert "reflection[1].hkl" in msg and "(2 2 0)" in msg and "sample@hkl" in msg and "(2 0 0)" in msg


@pytest.mark.parametrize("edit,field", [
    (lambda t: t.replace("energy_kev = 9.0", "energy_kev = 12.0"), "energy"),
    (lambda t: t.replace("distance_m = 0.25", "distance_m = 0.3"), "detector distance"),
    (lambda t: t.replace("pixel_size_um = [75.0, 75.0]", "pixel_size_um = [55.0, 55.0]"), "pixel size"),
    (lambda t: t.replace('{ name = "chi", axis = "y+"', '{ name = "chi", axis = "y-"'), "circles"),
])
def test_pipeline_and_scan_file_disagree(sim, tmp_path, capsys, no_phasing, edit, field):
    p = _pipeline(sim, tmp_path, edit)
    assert p.read_text() != (sim / "pipeline.toml").read_text() + NO_FILES
    code, err, _ = _run(["run", str(p), "--out", str(tmp_path / "out")], capsys)
    msg = _one_message(err)
    assert code == 2
    assert field in msg and "r0.h5" in msg and "instrument.override" in msg


def test_override_key_says_which_wins_and_the_values_are_printed(sim, tmp_path, capsys, monkeypatch):
    import braggstrain.phasing as ph

    seen = {}

    def stop(intensity, *a, **k):
        seen["called"] = True
        raise PhasingStarted()
    monkeypatch.setattr(ph, "ensemble", stop)
    p = _pipeline(sim, tmp_path, lambda t: t.replace("energy_kev = 9.0", 'energy_kev = 12.0\noverride = "scans"'))
    with pytest.raises(PhasingStarted):
        main(["run", str(p), "--out", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert seen and re.search(r"energy 9 keV.*from the scan files", out), out
    assert "pipeline file says 12 keV" in out


def test_all_zero_scan_is_refused_before_any_phasing(sim, tmp_path, capsys, no_phasing):
    from braggstrain.io.scans import read_scan, write_scan

    s = read_scan(sim / "scans" / "r3.h5")
    write_scan(sim / "scans" / "r3_zero.h5", np.zeros_like(s.frames), s.angles, s.rocking_circle, s.instrument,
               hkl=s.hkl)
    p = _pipeline(sim, tmp_path, lambda t: t.replace("scans/r3.h5", "scans/r3_zero.h5"))
    code, err, _ = _run(["run", str(p), "--out", str(tmp_path / "out")], capsys)
    msg = _one_message(err)
    assert code == 2 and "r3_zero.h5" in msg and "frames" in msg and "zero" in msg


# ---------------------------------------------------------------------------
# failures of the machine: a message, exit 1, nothing lost
# ---------------------------------------------------------------------------

def test_disk_full_while_writing_results(sim, earlier, capsys, monkeypatch):
    import braggstrain.io.results as res

    before = _snapshot(earlier)

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")
    monkeypatch.setattr(res, "_dataset", full)
    code, err, _ = _run(["-q", "run", str(sim / "pipeline.toml"), "--out", str(earlier), "--resume",
                         "--workers", "1"], capsys)
    msg = _one_message(err)
    assert code == 1
    assert "results.h5" in msg and "disk full" in msg and "needs about" in msg
    assert re.search(r"[0-9.]+ MB left on ", msg), msg
    assert _snapshot(earlier) == before
    assert not _partials(earlier)


def test_disk_full_while_saving_a_figure(sim, earlier, capsys, monkeypatch):
    from matplotlib.figure import Figure

    before = _snapshot(earlier)

    def full(self, fname, *a, **k):
        Path(fname).write_bytes(b"x" * 100)
        raise OSError(errno.ENOSPC, "No space left on device")
    monkeypatch.setattr(Figure, "savefig", full)
    code, err, _ = _run(["-q", "run", str(sim / "pipeline.toml"), "--out", str(earlier), "--resume",
                         "--workers", "1"], capsys)
    msg = _one_message(err)
    assert code == 1 and "disk full" in msg and ".png" in msg and "needs about" in msg
    # results.h5 comes first: this run's complete file replaced the earlier one
    # atomically; every other earlier output is untouched
    after = _snapshot(earlier)
    name = Path("results.h5")
    assert {k: v for k, v in after.items() if k != name} == {k: v for k, v in before.items() if k != name}
    from braggstrain.io.results import read_results

    assert read_results(earlier / "results.h5").reflections
    assert not _partials(earlier)


def test_not_enough_space_is_refused_up_front(sim, tmp_path, capsys, no_phasing, monkeypatch):
    import braggstrain.pipeline as pl

    from types import SimpleNamespace

    monkeypatch.setattr(pl.shutil, "disk_usage", lambda p: SimpleNamespace(total=10**9, used=10**9 - 10**5,
                                                                            free=10**5))
    out = tmp_path / "out"
    code, err, _ = _run(["run", str(sim / "pipeline.toml"), "--out", str(out)], capsys)
    msg = _one_message(err)
    assert code == 1 and str(out) in msg and "needs about" in msg and "0.1 MB" in msg
    assert not (out / "checkpoints").exists()


def test_space_estimate_bounds_a_real_run(sim, earlier):
    from braggstrain.pipeline import estimate_output_bytes

    from braggstrain.io.prepared import read_prepared

    cfg = load_config(sim / "pipeline.toml")
    prepared = [read_prepared(p) for p in sorted((earlier / "checkpoints").glob("prepare-*.h5"))]
    assert len(prepared) == 4
    est = estimate_output_bytes(cfg, prepared=prepared)
    used = sum(p.stat().st_size for p in earlier.rglob("*") if p.is_file())
    # on the safe side, but not a wild one; the bound from the crop alone is larger still
    assert used <= est <= 5 * used, (used, est)
    assert estimate_output_bytes(cfg) >= est


def test_read_only_output_folder_is_refused_up_front(sim, tmp_path, capsys, no_phasing, monkeypatch):
    import tempfile

    out = tmp_path / "ro"
    out.mkdir()
    (out / "keep.txt").write_text("earlier")
    real = tempfile.mkstemp

    def mkstemp(*a, dir=None, **k):
        if dir is not None and Path(dir).resolve().is_relative_to(out.resolve()):
            raise PermissionError(errno.EACCES, "Permission denied", str(dir))
        return real(*a, dir=dir, **k)
    monkeypatch.setattr(tempfile, "mkstemp", mkstemp)
    code, err, _ = _run(["run", str(sim / "pipeline.toml"), "--out", str(out)], capsys)
    msg = _one_message(err)
    assert code == 2 and str(out) in msg and "not writable" in msg
    assert sorted(p.name for p in out.iterdir()) == ["keep.txt"]


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_output_folder_for_real(sim, tmp_path, capsys, no_phasing):
    out = tmp_path / "ro"
    out.mkdir()
    out.chmod(0o555)
    try:
        code, err, _ = _run(["run", str(sim / "pipeline.toml"), "--out", str(out)], capsys)
    finally:
        out.chmod(0o755)
    assert code == 2 and "not writable" in _one_message(err)


def test_damaged_results_file_gives_one_message(earlier, tmp_path, capsys):
    src = (earlier / "results.h5").read_bytes()
    n = len(src)
    messages = []
    for k in range(6):
        rng = np.random.default_rng(100 + k)
        data = bytearray(src)
        at = int(rng.integers(n // 8, n - 4096))
        data[at:at + 4096] = rng.integers(0, 256, 4096, dtype=np.uint8).tobytes()
        bad = tmp_path / f"damaged{k}.h5"
        bad.write_bytes(bytes(data))
        code, err, _ = _run(["-q", "report", str(bad), "--out", str(tmp_path / f"rep{k}")], capsys)
        if code == 0:
            continue  # the bytes hit something the report does not read
        msg = _one_message(err)
        assert code == 2 and str(bad) in msg, msg
        messages.append(msg)
    assert messages, "no damage was detected in six tries"
    assert any(re.search(r"'/[^']+'", m) for m in messages), messages


def test_stale_partial_files_are_cleaned_at_the_start(sim, tmp_path, capsys, monkeypatch):
    import braggstrain.phasing as ph

    out = tmp_path / "out"
    (out / "figures").mkdir(parents=True)
    stale = [out / "figures" / ".strain.png.k2j4x_a9.part.png", out / ".results.h5.abcd1234.part.h5",
             out / "figures" / ".report.html.zzzzzzzz.part.html"]
    for s in stale:
        s.write_bytes(b"half")
    (out / "vtk" / ".crystal.vtk.ab12_x9z").mkdir(parents=True)
    (out / "vtk" / ".crystal.vtk.ab12_x9z" / "crystal.vti").write_bytes(b"half")
    stale.append(out / "vtk" / ".crystal.vtk.ab12_x9z")
    mine = [out / "figures" / "notes.part.txt", out / ".hidden"]
    for s in mine:
        s.write_text("user's")

    def stop(*a, **k):
        raise PhasingStarted()
    monkeypatch.setattr(ph, "ensemble", stop)
    with pytest.raises(PhasingStarted):
        main(["-q", "run", str(sim / "pipeline.toml"), "--out", str(out)])
    assert not any(s.exists() for s in stale)
    assert all(s.exists() for s in mine)


def _children(pid):
    out = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                stat = (d / "stat").read_text()
            except OSError:
                continue
            fields = stat.rsplit(")", 1)[1].split()
            if int(fields[1]) == pid and fields[0] != "Z":
                out.append(int(d.name))
    return out


def _alive(pid):
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc to find the workers")
def test_sigkill_leaves_no_pool_workers_or_resource_tracker(tmp_path):
    script = tmp_path / "parent.py"
    script.write_text(
        "import time\n"
        "from braggstrain.pipeline import _executor\n"
        "if __name__ == '__main__':\n"
        "    with _executor(None, 2) as (ex, where):\n"
        "        futs = [ex.submit(time.sleep, 120) for _ in range(2)]\n"
        "        time.sleep(4)\n"
        "        print('ready', flush=True)\n"
        "        time.sleep(120)\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, env=env)
    try:
        assert proc.stdout.readline().strip() == b"ready"
        kids = _children(proc.pid)
        assert len(kids) >= 3, kids  # two workers and the resource tracker
        proc.kill()
        proc.wait()
        t0 = time.time()
        while time.time() - t0 < 20 and any(_alive(k) for k in kids):
            time.sleep(0.2)
        assert not [k for k in kids if _alive(k)], "orphans left alive"
    finally:
        if proc.poll() is None:
            proc.kill()
        for k in _children(proc.pid):
            os.kill(k, signal.SIGKILL)


# ---------------------------------------------------------------------------
# the command line
# ---------------------------------------------------------------------------

def test_closed_stdout_is_quiet(sim):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen([sys.executable, "-m", "braggstrain", "-q", "inspect", str(sim / "scans" / "r0.h5")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    proc.stdout.close()  # like `| head -0`: the reader is gone before the first line
    err = proc.stderr.read().decode()
    proc.wait(timeout=120)
    assert "Traceback" not in err and "BrokenPipe" not in err, err
    assert proc.returncode in (0, 1)


def test_common_options_after_the_subcommand(sim, capsys):
    assert main(["inspect", "-q", str(sim / "scans" / "r0.h5")]) == 0
    assert "frames" in capsys.readouterr().out
    assert main(["-q", "inspect", str(sim / "scans" / "r0.h5")]) == 0


@pytest.mark.parametrize("n", ["0", "-3", "two"])
def test_bad_worker_counts_exit_2(sim, tmp_path, capsys, n):
    with pytest.raises(SystemExit) as e:
        main(["run", str(sim / "pipeline.toml"), "--out", str(tmp_path / "out"), "--workers", n])
    assert e.value.code == 2
    assert "--workers" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_one_worker_runs_in_process_without_any_pool(monkeypatch):
    """`--workers 1` means no worker processes: the ensemble must not fall
    back to its own default pool (behaviour of the tool, no outside source)."""
    from braggstrain import pipeline
    from braggstrain.phasing import PhasingStage

    ensemble_module = importlib.import_module("braggstrain.phasing.ensemble")  # the module, not the function

    def no_pool(*args, **kwargs):
        raise AssertionError("a worker pool was made for --workers 1")

    monkeypatch.setattr(ensemble_module, "worker_pool", no_pool)
    with pipeline._executor(None, 1) as (executor, where):
        assert executor is not None and "in-process" in where
        assert list(executor.map(abs, [-2, 3])) == [2, 3]
    cube = np.zeros((16, 16, 16))
    cube[6:10, 6:10, 6:10] = 1.0
    intensity = 100.0 * np.abs(np.fft.fftn(cube)) ** 2
    res = ensemble_module.ensemble(intensity, runs=2, keep=1, seed=0, executor=executor, coherence=False,
                                   plan=[PhasingStage("ER", 5, None, "none")],
                                   free_fraction=0.0, metric="nll")
    assert len(res.runs) == 2

def test_inspect_says_which_preparation_options(sim, capsys):
    assert main(["inspect", str(sim / "scans" / "r0.h5")]) == 0
    assert "default [prepare] options" in capsys.readouterr().out
    assert main(["inspect", str(sim / "scans" / "r0.h5"), "--config", str(sim / "pipeline.toml")]) == 0
    out = capsys.readouterr().out
    assert "[prepare] of " in out and "crop" in out
    assert re.search(r"array\s+\(32, 32, 32\)|shape[^\n]*32, 32, 32|32 × 32 × 32", out), out


# ---------------------------------------------------------------------------
# smaller things: what the run, the demo and the report say
# ---------------------------------------------------------------------------

def test_simulation_line_prints_the_peak_and_the_hot_pixels_apart(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text(small_toml(hkls=((1, 1, 1), (2, 0, 0), (0, 2, 0)), frames=24, window=40))
    lines = []
    simulate_experiment(load_config(p), tmp_path / "sim", log=lines.append)
    for ln in [x for x in lines if "frames," in x]:
        m = re.search(r"peak (\d+) counts, (\d+) hot pixels \(up to (\d+) counts\)", ln)
        assert m, ln
        peak, n_hot, hot = map(int, m.groups())
        # [simulate] peak_counts = 1e5 and hot_pixels = 3 in the test scenario
        assert n_hot == 3 and 2e4 < peak < 5e5 and hot > peak, ln


def test_run_summary_calls_the_spread_a_spread(earlier):
    from braggstrain.cli import _summary
    from braggstrain.io.results import read_results

    text = _summary({"results": read_results(earlier / "results.h5"), "paths": {}})
    assert "±" not in text
    assert "spread" in text and "not an uncertainty" in text
    if "dislocation: b" in text:
        assert "(−b, −ξ) is the same dislocation" in text and "ξ = [" in text


def test_burgers_sign_is_compared_up_to_the_joint_flip():
    from braggstrain.simulate.demo import same_dislocation

    b = np.array([0.0, 0.5, -0.5])
    xi = np.array([1.0, 0.0, 0.0])
    assert same_dislocation(b, xi, b, xi)
    assert same_dislocation(-b, -xi, b, xi)          # (−b, −ξ) is the same dislocation
    assert not same_dislocation(-b, xi, b, xi)       # a sign error
    assert not same_dislocation(b, -xi, b, xi)
    # the twin ρ'(r) = conj ρ(−r) has u'(r) = −u(−r): for a screw dislocation along z,
    # u_z = b θ / 2π (Hull & Bacon, Introduction to Dislocations, 5th ed., 2011, ch. 4,
    # from memory), the circuit right-handed about +z gives +b for u and −b for u'
    bz = 1.0

    def u(p):
        return bz * np.arctan2(p[1], p[0]) / (2 * np.pi)

    def u_twin(p):
        return -u(-np.asarray(p))

    def circulation(f, n=720):
        t = np.linspace(0, 2 * np.pi, n + 1)
        vals = np.array([f((5 * np.cos(a), 5 * np.sin(a), 0.0)) for a in t])
        d = np.diff(vals)
        d = (d + bz / 2) % bz - bz / 2  # remove the branch-cut jump of atan2
        return d.sum()
    assert circulation(u) == pytest.approx(bz)
    assert circulation(u_twin) == pytest.approx(-bz)
    # so a twin reconstruction finds (−b, ξ) for the true (b, ξ): the same dislocation
    assert same_dislocation(-b, xi, b, xi, twin=True)
    assert not same_dislocation(b, xi, b, xi, twin=True)


def test_report_items(earlier, tmp_path, capsys):
    html = (earlier / "report.html").read_text()
    prov = html[html.index("<h2>Provenance</h2>"):]
    seeds = prov[prov.index("<caption>Seeds</caption>"):]
    seeds = seeds[:seeds.index("</table>")]
    assert "runs" not in seeds and "keep" not in seeds
    assert "Phasing ensemble" in prov and "random starts per reflection" in prov
    assert "braggstrain -q run " in prov and "--workers 1" in prov          # the command line
    timings = prov[prov.index("Stage timings"):]
    timings = timings[:timings.index("</table>")]
    assert ">outputs<" in timings
    # the reflections table: ten columns at most, so it fits a 1280-pixel window
    refl = html[html.index("<h2>Reflections</h2>"):]
    first = refl[refl.index("<tr>"):refl.index("</tr>")]
    assert first.count("<th") <= 10
    assert "Final metrics of the best kept random start" in refl


def test_history_figure_has_no_empty_panel_and_marks_the_stages():
    from types import SimpleNamespace

    from braggstrain.report.figures import plot_histories, plot_runs

    it = np.arange(300)
    hist = {"amplitude_error": np.exp(-it / 50.0) + 0.01, "support_size": 5000 - 3 * it,
            "stage": (it >= 120).astype(float) + (it >= 250), "checkpoint": np.arange(0, 300, 20.0),
            "free_nll": np.linspace(9, 3, 15), "background": np.zeros(15)}
    # the figures ask only these of a Results and its ReflectionResult
    refl = [SimpleNamespace(name="a", hkl=(1, 1, 1), history=hist, ranking_metric="free_nll",
                            run_metrics=[{"run": 0, "free_nll": 3.0, "kept": True, "status": "ok"}])]
    fig = plot_histories(SimpleNamespace(reflections=refl))
    titles = [ax.get_title() for ax in fig.axes]
    assert "background" not in titles and len(fig.axes) == 3, titles
    for ax in fig.axes:
        xs = sorted({float(ln.get_xdata()[0]) for ln in ax.get_lines() if ln.get_linestyle() == "--"})
        assert xs == [120.0, 250.0], (ax.get_title(), xs)
        assert ax.get_ylabel() and ax.get_xlabel() == "iteration"
    assert [ax.get_ylabel() for ax in fig.axes if ax.get_title() == "support size"] == ["voxels"]
    fig = plot_runs(SimpleNamespace(reflections=refl))
    assert "negative log-likelihood" in fig.axes[0].get_xlabel()


def test_atomic_write_fails_on_a_full_disk_reported_only_on_release(tmp_path):
    # HDF5 reports some failed writes only where h5py releases an object (an
    # "unraisable" error): the write must fail, not rename a broken file into place
    import sys
    from types import SimpleNamespace

    from braggstrain.errors import OutputError
    from braggstrain.io.files import atomic_path

    target = tmp_path / "r.h5"
    target.write_bytes(b"earlier")
    hooks = sys.unraisablehook, sys.excepthook
    try:
        with pytest.raises(OutputError, match=r"r\.h5: disk full while writing \(it needs about"):
            with atomic_path(target) as tmp:
                tmp.write_bytes(b"x" * 5000)
                sys.unraisablehook(SimpleNamespace(exc_value=OSError(errno.ENOSPC, "No space left on device"),
                                                   exc_type=OSError, exc_traceback=None, err_msg=None,
                                                   object=None))
    finally:
        sys.unraisablehook, sys.excepthook = hooks
    assert target.read_bytes() == b"earlier" and not _partials(tmp_path)


def test_atomic_write_refuses_what_cannot_fit(tmp_path, monkeypatch):
    from types import SimpleNamespace

    import braggstrain.io.files as sc
    from braggstrain.errors import OutputError

    monkeypatch.setattr(sc.shutil, "disk_usage", lambda p: SimpleNamespace(total=10**9, used=10**9, free=2 * 10**5))
    with pytest.raises(OutputError, match=r"not enough space to write \(it needs about 1\.0 MB, 0\.2 MB left"):
        with sc.atomic_path(tmp_path / "big.h5", size_hint=10**6):
            raise AssertionError("nothing may be written")
    assert not list(tmp_path.iterdir())
