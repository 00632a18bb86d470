"""Command line: ``braggstrain COMMAND ...`` (wiring only).

Exit codes: 0 ok, 1 failed, 2 bad input (pipeline file, scan file, arguments).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

from . import __version__
from .errors import BraggStrainError, InputError

__all__ = ["main"]


def _print(msg="", quiet=False):
    if not quiet:
        print(msg, flush=True)


def cmd_simulate(args):
    from .config import load_config
    from .demo import simulate_experiment

    cfg = load_config(args.config)
    _print(f"simulating {len(cfg['reflection'])} reflections of {args.config} into {args.out}", args.quiet)
    res = simulate_experiment(cfg, args.out, log=None if args.quiet else print)
    _print(f"wrote {len(res['scans'])} scan files, {res['truth']} and {res['pipeline']} "
           f"in {res['seconds']:.1f} s", args.quiet)
    return 0


def describe_scan(path):
    """Text lines describing a scan file (used by ``inspect``)."""
    from .scanio import read_scan

    scan = read_scan(path)
    fr = scan.frames
    lines = [f"scan file   {path}",
             f"frames      {fr.shape[0]} × {fr.shape[1]} rows × {fr.shape[2]} columns ({fr.dtype})",
             f"energy      {scan.instrument.energy_kev:g} keV (λ = {scan.instrument.wavelength:.5f} Å)",
             f"reflection  {scan.hkl if scan.hkl else 'not given'}"
             + (f" of {scan.material}" if scan.material else "")]
    for c in scan.instrument.circles:
        a = np.asarray(scan.angles[c.name])
        role = "sample" if c in scan.instrument.sample_circles else "detector"
        if a.ndim:
            lines.append(f"  {role:8s} {c.name:8s} {c.axis}  {a[0]:.4f} → {a[-1]:.4f}° "
                         f"(step {np.mean(np.diff(a)):.5f}°, rocked)")
        else:
            lines.append(f"  {role:8s} {c.name:8s} {c.axis}  {float(a):.4f}°")
    d = scan.instrument.detector
    lines.append(f"detector    {d.shape[0]}×{d.shape[1]} px of {d.pixel_size[0] * 1e6:g}×{d.pixel_size[1] * 1e6:g} µm "
                 f"at {d.distance:g} m, direct beam at ({d.direct_beam[0]:g}, {d.direct_beam[1]:g})")
    peak = np.unravel_index(int(np.argmax(fr)), fr.shape)
    lines.append(f"max counts  {int(fr.max())} at (frame, row, column) {tuple(int(v) for v in peak)}"
                 "  (raw: hot pixels not yet removed)")
    masked = 0 if scan.mask is None else int(np.count_nonzero(scan.mask))
    lines.append(f"mask        {masked} pixels flagged in the file")
    try:
        from .prepare import prepare_scan, summarize_prepared
    except ImportError:  # pragma: no cover - the preparation stage is part of the package
        return lines
    try:
        prep = prepare_scan(scan)
        lines.append("after preparation:")
        lines.extend("  " + s for s in summarize_prepared(prep).splitlines())
    except BraggStrainError as e:
        lines.append(f"preparation failed: {e}")
    return lines


def cmd_inspect(args):
    for line in describe_scan(args.file):
        print(line)
    return 0


def build_parser():
    p = argparse.ArgumentParser(prog="braggstrain",
                                description="Strain tensor, lattice rotation and dislocations of a nanocrystal "
                                            "from Bragg coherent diffraction imaging at several reflections.")
    p.add_argument("--version", action="version", version=f"braggstrain {__version__}")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress output")
    sub = p.add_subparsers(dest="command", required=True)

    s = sub.add_parser("simulate", help="simulate the scans a pipeline file describes ([simulate] table)")
    s.add_argument("config", help="pipeline file (TOML)")
    s.add_argument("--out", required=True, help="output folder for scan files, truth.h5 and pipeline.toml")
    s.set_defaults(func=cmd_simulate)

    s = sub.add_parser("inspect", help="describe a scan file")
    s.add_argument("file", help="braggstrain scan file (HDF5)")
    s.set_defaults(func=cmd_inspect)
    return p


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if not hasattr(args, "quiet"):
        args.quiet = False
    try:
        return int(args.func(args) or 0)
    except InputError as e:
        print(f"braggstrain: error: {e}", file=sys.stderr)
        return 2
    except BraggStrainError as e:
        print(f"braggstrain: failed: {e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("braggstrain: interrupted", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
