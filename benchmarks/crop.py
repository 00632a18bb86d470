"""The automatic crop of a weak reflection against a flat background.

Simulates one reflection of the demo crystal (``pipelines/demo.toml``, its
first reflection) with the project's simulator at two peak intensities and
the same flat background, prepares each scan with the demo's ``[prepare]``
options (``crop = "auto"``), and times one phase-retrieval run (the default
plan, one random start, one thread) on each prepared array.

Usage::

    python benchmarks/crop.py [--background 0.5] [--peaks 1e5 1e4] [--no-phasing]

One line per peak intensity, then the last line, exactly::

    crop_weak/crop_strong=<voxel ratio> time_weak/time_strong=<ratio>

This is a benchmark, not a test: the times depend on the machine and on
what else runs on it.
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np


def simulate_reflection(peak_counts, background, seed=2026, index=0):
    """One simulated scan of the demo crystal (a braggstrain Scan)."""
    from braggstrain.config import build_crystal, build_instrument, build_specimen, load_config
    from braggstrain.io.scans import Scan
    from braggstrain.simulate import forward as fw

    cfg = load_config(Path(__file__).resolve().parents[1] / "pipelines" / "demo.toml")
    crystal = build_crystal(cfg)
    inst = build_instrument(cfg)
    shape, field_, _ = build_specimen(cfg, crystal)
    sim = cfg["simulate"]
    r = cfg["reflection"][index]
    rock = sim["rocking_circle"]
    g = crystal.reflection(r["hkl"], inst.energy_kev).g_sample
    pix = inst.detector.direct_beam
    ang = inst.solve_bragg(g, free=sim["free_circles"], fixed=sim["fixed_angles"], pixel=pix)
    M, _, _ = inst.linear_map(ang, rock, 0.01, pix)
    step = sim["rocking_q_step"] / (np.linalg.norm(M[:, 0]) / 0.01)
    s = fw.simulate_scan(inst, crystal, r["hkl"], shape, field_, rocking_circle=rock, n_frames=sim["frames"],
                         step_deg=step, free_circles=sim["free_circles"], fixed_angles=sim["fixed_angles"],
                         window=tuple(sim["window"]), peak_counts=peak_counts, background=background,
                         hot_pixels=sim["hot_pixels"], supersample=sim["supersample"], seed=seed, bragg_angles=ang)
    return Scan(frames=s.frames, angles=s.angles, rocking_circle=rock, instrument=inst, mask=s.mask,
                hkl=tuple(r["hkl"]), path=f"<simulated {tuple(r['hkl'])}, {peak_counts:g} counts>"), cfg


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--background", type=float, default=0.5, help="flat background, counts per pixel per frame")
    ap.add_argument("--peaks", type=float, nargs=2, default=[1e5, 1e4], help="strong and weak peak counts")
    ap.add_argument("--no-phasing", action="store_true", help="skip the phasing runs")
    args = ap.parse_args(argv)

    from braggstrain.phasing import reconstruct
    from braggstrain.prepare.scan import prepare_scan

    voxels, times = [], []
    for peak in args.peaks:
        scan, cfg = simulate_reflection(peak, args.background)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            prep = prepare_scan(scan, **{k: (tuple(v) if isinstance(v, list) else v)
                                         for k, v in cfg["prepare"].items()})
        raw = tuple(int(b - a) for a, b in prep.crop)
        line = (f"peak {peak:.0e} counts, background {args.background:g}: raw crop {raw[0]} × {raw[1]} × {raw[2]}, "
                f"prepared {prep.shape}, σ {np.round(prep.oversampling, 2).tolist()}")
        ch = getattr(prep, "crop_choice", {})
        if "background" in ch:  # the crop's own report (absent before choose_crop existed)
            line += (f", background {ch['background']:.3f}, signal extent {tuple(ch['signal_extent'])}, "
                     f"limited by {ch['limited_by']}")
        voxels.append(float(np.prod(prep.shape)))
        if not args.no_phasing:
            t0 = time.perf_counter()
            rec = reconstruct(prep.intensity, prep.mask, seed=0, threads=1, raise_on_failure=False)
            dt = time.perf_counter() - t0
            times.append(dt)
            line += f"; one phasing run {dt:.1f} s ({rec.status})"
        print(line, flush=True)
    tr = times[1] / times[0] if len(times) == 2 else float("nan")
    print(f"crop_weak/crop_strong={voxels[1] / voxels[0]:.2f} time_weak/time_strong={tr:.2f}")


if __name__ == "__main__":
    main()
