"""Command line: ``braggstrain COMMAND ...`` (wiring only).

Exit codes: 0 ok, 1 failed, 2 bad input (pipeline file, scan file, arguments).
"""

from __future__ import annotations

import argparse
import os
import shlex
import sys

from pathlib import Path

import numpy as np

from braggstrain import __version__
from braggstrain.errors import BraggStrainError, InputError

__all__ = ["main"]


def _print(msg="", quiet=False):
    if not quiet:
        print(msg, flush=True)


def cmd_simulate(args):
    from braggstrain.config import load_config
    from braggstrain.simulate.demo import simulate_experiment

    cfg = load_config(args.config)
    _print(f"simulating {len(cfg['reflection'])} reflections of {args.config} into {args.out}", args.quiet)
    res = simulate_experiment(cfg, args.out, log=None if args.quiet else print)
    _print(f"wrote {len(res['scans'])} scan files, {res['truth']} and {res['pipeline']} "
           f"in {res['seconds']:.1f} s", args.quiet)
    return 0


def describe_scan(path, config=None):
    """Text lines describing a scan file (used by ``inspect``).

    ``config``: a pipeline file whose ``[prepare]`` options the preparation
    uses (default: the options' defaults); the lines say which."""
    from braggstrain.io.scans import read_scan

    prep_opts, prep_from = {}, "default [prepare] options (give --config PIPELINE to use a pipeline file's)"
    if config is not None:
        from braggstrain.config import load_config
        from braggstrain.pipeline import check_options

        prep_opts = check_options(load_config(config))["prepare"]
        shown = ", ".join(f"{k} = {list(v) if isinstance(v, tuple) else v!r}" for k, v in prep_opts.items())
        prep_from = f"[prepare] of {config}" + (f": {shown}" if shown else " (empty: defaults)")
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
    from braggstrain.prepare.scan import prepare_scan, summarize_prepared

    try:
        prep = prepare_scan(scan, **prep_opts)
        lines.append(f"after preparation with {prep_from}:")
        lines.extend("  " + s for s in summarize_prepared(prep).splitlines())
    except BraggStrainError as e:
        lines.append(f"preparation failed: {e}")
    return lines


def describe_reflection(cfg, i):
    """Text lines describing reflection i of a pipeline file: where every
    value comes from, the frames, motors, monitor, rocking jitter, and the
    crop the preparation would choose (used by ``inspect``)."""
    from braggstrain.io.frames import describe_frames
    from braggstrain.pipeline import _prepare_options, _scan_for, prepare_options
    from braggstrain.prepare.measured import fit_rocking_step
    from braggstrain.prepare.scan import prepare_scan, summarize_prepared

    r = cfg["reflection"][i]
    name = r["name"]  # defaulted and checked by the schema
    opts = prepare_options(cfg)
    scan, _ = _scan_for(cfg, i, r, opts)
    lines = [f"reflection  {name} {tuple(r['hkl'])} of {cfg.get('_source')}"]
    if r["scan"] is not None:
        lines.append(f"scan file   {scan.path}")
    else:
        reps = scan.extra.get("repeats")
        srcs = reps["sources"] if reps else [scan.path]
        for k, s in enumerate(srcs):
            d = describe_frames(s, r["dataset"])
            comp = ", ".join(d["compression"]) or "none"
            how = " (virtual dataset)" if d["virtual"] else " (external link)" if d["external_link"] else ""
            lines.append(f"frames{'' if len(srcs) == 1 else f' [{k}]':6s} {s}: {d['format']}{how}, {d['frames']} "
                         f"frames of {d['shape'][0]} × {d['shape'][1]} ({d['dtype']}), compression {comp}, "
                         f"{len(d['files'])} file(s)")
        if reps:
            sh = np.asarray(reps["shifts"])
            lines.append("repeats     aligned to the first by the peak's centre of mass; shifts (frames, rows, "
                         "columns): " + "; ".join(f"({a:+.2f}, {b:+.2f}, {c:+.2f})" for a, b, c in sh))
    roi = scan.extra.get("roi")
    if roi:
        full = cfg["instrument"]["detector"]["shape"]
        lines.append(f"detector    region of interest from row {roi[0]}, column {roi[1]} of the {full[0]} × "
                     f"{full[1]} detector")
    sources = scan.extra.get("sources", {})
    for c in scan.instrument.circles:
        a = np.asarray(scan.angles[c.name], float)
        where = sources.get(c.name, "pipeline file")
        if a.ndim:
            lines.append(f"  {c.name:8s} {a[0]:.4f} → {a[-1]:.4f}° per frame ({where})")
        else:
            lines.append(f"  {c.name:8s} {float(a):.4f}° ({where})")
    lines.append(f"energy      {scan.instrument.energy_kev:g} keV ({sources.get('energy_kev', 'pipeline file')}); "
                 f"detector distance {scan.instrument.detector.distance:g} m "
                 f"({sources.get('distance_m', 'pipeline file')})")
    if scan.monitor is not None:
        m = np.asarray(scan.monitor, float)
        lines.append(f"monitor     {m.min():.6g} … {m.max():.6g} (mean {m.mean():.6g}) from {sources.get('monitor')}"
                     + (f"; {int(np.sum(m <= 0))} frame(s) ≤ 0 will be masked" if np.any(m <= 0) else ""))
    elif scan.extra.get("repeats", {}).get("monitor_scale"):
        sc = scan.extra["repeats"]["monitor_scale"]
        lines.append("monitor     applied to each repeat before the sum; mean scale per repeat "
                     + ", ".join(f"{v:.4g}" for v in sc) + f" ({sources.get('monitor')})")
    else:
        lines.append("monitor     none")
    rc = scan.rocking_circle
    step, dev = fit_rocking_step(scan.rocking_angles, source=scan.path, field=f"angles.{rc}")
    k = int(np.argmax(np.abs(dev)))
    lines.append(f"rocking     {rc} step {step:.6g}° (straight-line fit); read-back deviation rms "
                 f"{np.sqrt(np.mean(dev ** 2)):.3g}°, largest {dev[k]:+.3g}° at frame {k} "
                 f"({abs(dev[k] / step):.1%} of the step)")
    if abs(dev[k] / step) > 0.01:
        lines.append("  deviation per frame, % of the step: " + " ".join(f"{100 * v / step:+.1f}" for v in dev))
    fr = scan.frames
    lines.append(f"max counts  {float(np.max(fr)):.6g} (raw: hot pixels not yet removed)")
    try:
        prep = prepare_scan(scan, **_prepare_options(scan, opts))
        shown = ", ".join(f"{k} = {list(v) if isinstance(v, tuple) else v!r}" for k, v in opts.items())
        lines.append(f"after preparation with [prepare] of {cfg.get('_source')}"
                     + (f": {shown}:" if shown else " (empty: defaults):"))
        lines.extend("  " + s for s in summarize_prepared(prep).splitlines())
    except BraggStrainError as e:
        lines.append(f"preparation failed: {e}")
    return lines


def describe_source(path):
    """Text lines describing a file that is not a scan file: a frames source."""
    from braggstrain.io.frames import describe_frames, read_frames

    d = describe_frames(path)
    fr = read_frames(path)
    peak = np.unravel_index(int(np.argmax(fr)), fr.shape)
    return [f"frames      {path}: {d['format']}, {d['frames']} frames of {d['shape'][0]} × {d['shape'][1]} "
            f"({d['dtype']}), compression {', '.join(d['compression']) or 'none'}",
            "files       " + ", ".join(d["files"][:5]) + (" ..." if len(d["files"]) > 5 else ""),
            f"max counts  {float(fr.max()):.6g} at (frame, row, column) {tuple(int(v) for v in peak)}",
            "(angles, monitor and geometry come from a pipeline file: braggstrain inspect FILE.toml "
            "--reflection NAME)"]


def cmd_inspect(args):
    from braggstrain.config import load_config

    path = str(args.file)
    if path.lower().endswith(".toml"):
        cfg = load_config(path)
        names = [r["name"] for r in cfg["reflection"]]
        if args.reflection is not None:
            if args.reflection not in names:
                raise InputError(f"{path}: reflection '{args.reflection}' not found; expected one of {names}")
            which = [names.index(args.reflection)]
        else:
            which = range(len(names))
        for i in which:
            for line in describe_reflection(cfg, i):
                print(line, flush=True)
        return 0
    if _is_scan_file(path):
        lines = describe_scan(path, config=args.config)
    else:
        lines = describe_source(path)
    for line in lines:
        print(line, flush=True)
    return 0


def _is_scan_file(path):
    from braggstrain.io.frames import split_source

    p, ds = split_source(path)
    if ds is not None or not p.is_file() or p.suffix.lower() not in (".h5", ".hdf5", ".nxs", ".hdf"):
        return False
    import h5py

    try:
        with h5py.File(p, "r") as f:
            fmt = f.attrs.get("format")
    except OSError:
        return True  # let the scan reader name the problem
    fmt = fmt.decode() if isinstance(fmt, bytes) else fmt
    return fmt == "braggstrain-scan"


def _timing_table(timings, wall):
    lines = ["stage        seconds   share"]
    for k, v in timings.items():
        lines.append(f"{k:10s} {v:9.1f} {100 * v / wall:6.1f} %")
    lines.append(f"{'total':10s} {wall:9.1f}")
    return "\n".join(lines)


def _summary(res):
    r = res["results"]
    tf = r.tensor
    lines = []
    sup = tf.support
    stats = []
    for c in ("xx", "yy", "zz"):
        v = r.strain(c)[sup]
        v = v[np.isfinite(v)]
        if v.size:
            stats.append(f"ε_{c} {np.mean(v):+.2e} (spread {np.std(v):.1e})")
    lines.append(f"strain inside the crystal ({int(sup.sum())} voxels), mean and spread (standard deviation "
                 "over the voxels, not an uncertainty; per-voxel one-σ errors are in results.h5 "
                 "/tensor/strain_uncertainty): " + ", ".join(stats))
    lines.append(f"G set condition number {tf.condition_number:.2f}")
    sig = np.asarray(tf.strain_uncertainty, float)[:, :, np.asarray(tf.trusted, bool)]
    basis = tf.uncertainty_basis or "not recorded"
    if np.isfinite(sig).any():
        med = [np.nanmedian(sig[i, i]) for i in range(3)]
        lines.append("error bars (median σ, trusted voxels): " + ", ".join(
            f"ε_{n} {m:.1e}" for n, m in zip(("xx", "yy", "zz"), med)) + f"; {basis}")
    else:
        lines.append(f"error bars: none. {basis}")
    ml = r.mean_lattice
    if ml.get("lattice_parameter") is not None:
        lines.append(f"mean lattice parameter from the peak positions: {ml['lattice_parameter']:.5f} Å")
    for d in r.dislocations:
        b = " ".join(f"{v:+.2f}" for v in np.atleast_1d(d.burgers)) if d.burgers is not None else "unknown"
        c = ", ".join(f"{v / 10:.0f}" for v in d.center)
        xi = np.asarray(d.directions, float).mean(axis=0) if len(d.directions) else np.full(3, np.nan)
        xi = xi / np.linalg.norm(xi) if np.all(np.isfinite(xi)) and np.linalg.norm(xi) > 0 else xi
        lines.append(f"dislocation: b = [{b}] (lattice) for the line direction ξ = "
                     f"[{' '.join(f'{v:+.2f}' for v in xi)}] (sample frame), {d.character_deg:.0f}° character, "
                     f"length {d.length / 10:.0f} nm, centre ({c}) nm, seen in {len(d.visible_in)} reflections")
    if r.dislocations:
        lines.append("  (b is defined for the line direction ξ (right-handed circuit about ξ, h·b = −winding): "
                     "(−b, −ξ) is the same dislocation, so a sign of b only means something with ξ; "
                     "docs/defects.md)")
    if not r.dislocations:
        lines.append("no dislocations found")
    for k, v in res["paths"].items():
        if isinstance(v, (list, tuple)):
            lines.append(f"{k}: {len(v)} files in {Path(v[0]).parent if v else '-'}")
        else:
            lines.append(f"{k}: {v}")
    return "\n".join(lines)


def cmd_run(args):
    from braggstrain.config import load_config
    from braggstrain.pipeline import run_pipeline

    cfg = load_config(args.config)
    res = run_pipeline(cfg, args.out, resume=args.resume, scheduler=args.scheduler, workers=args.workers,
                       progress=not args.quiet, log=None if args.quiet else print, command=args.command_line)
    _print(_summary(res), args.quiet)
    _print(_timing_table(res["timings"], res["wall_s"]), args.quiet)
    return 0


def cmd_demo(args):
    from braggstrain.config import load_config
    from braggstrain.simulate.demo import simulate_experiment
    from braggstrain.pipeline import run_pipeline

    out = Path(args.out)
    demo = Path(__file__).resolve().parent / "data" / "demo.toml"
    cfg = load_config(demo)
    _print(f"simulating the demo crystal into {out} ...", args.quiet)
    sim = simulate_experiment(cfg, out, log=None if args.quiet else print)
    cfg = load_config(sim["pipeline"])
    _print("running the pipeline on the simulated scans ...", args.quiet)
    res = run_pipeline(cfg, out, resume=args.resume, scheduler=args.scheduler, workers=args.workers,
                       progress=not args.quiet, log=None if args.quiet else print, command=args.command_line)
    _print(_summary(res), args.quiet)
    from braggstrain.simulate.demo import compare_routes

    try:
        _print(compare_routes(res["results"], out / "truth.h5"), args.quiet)
    except BraggStrainError as e:  # pragma: no cover - the comparison is informative only
        _print(f"(no comparison with the truth: {e})", args.quiet)
    _print(_timing_table(res["timings"], res["wall_s"]), args.quiet)
    return 0


def cmd_prepare(args):
    from braggstrain.config import load_config
    from braggstrain.io.prepared import write_prepared
    from braggstrain.pipeline import _prepare_options, _scan_for, check_options
    from braggstrain.prepare.scan import prepare_scan, summarize_prepared

    cfg = load_config(args.config)
    opts = check_options(cfg)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    for i, r in enumerate(cfg["reflection"]):
        scan, _ = _scan_for(cfg, i, r, opts["prepare"])
        prep = prepare_scan(scan, **_prepare_options(scan, opts["prepare"]))
        name = r["name"]  # checked and defaulted by the schema
        path = write_prepared(prep, out / f"{name}_prepared.h5")
        _print(f"{name} {tuple(r['hkl'])} → {path}", args.quiet)
        for line in summarize_prepared(prep).splitlines():
            _print("  " + line, args.quiet)
    return 0


def cmd_report(args):
    from braggstrain.report import figures
    from braggstrain.io import results as outputs
    from braggstrain.report import html as report

    from braggstrain.io.files import remove_partial_files
    from braggstrain.pipeline import check_output_folder

    results = outputs.read_results(args.results)
    out = Path(args.out) if args.out else Path(args.results).resolve().parent
    check_output_folder(out)
    remove_partial_files(out / "figures", recursive=False)
    figs = figures.make_figures(results, out / "figures")
    path = report.write_report(results, out, figures=figs)
    _print(f"report: {path} ({len(figs)} figures)", args.quiet)
    return 0


def cmd_export(args):
    from braggstrain.io.vtk import export_vtk

    if not args.vtk:
        raise InputError("export: choose a format, e.g. --vtk")
    out = Path(args.out) if args.out else Path(args.results).resolve().parent / "vtk"
    paths = export_vtk(args.results, out)
    for p in paths:
        _print(f"wrote {p}", args.quiet)
    return 0


def cmd_plan(args):
    from braggstrain.config import load_config
    from braggstrain.planner import plan

    cfg = load_config(args.config, require_reflections=False)
    out = Path(args.out) if args.out else Path.cwd() / "plan"
    result = plan.plan_from_config(cfg, out)
    print(plan.format_plan_table(result))
    return 0


def _positive_int(text):
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive whole number of worker processes, got {text!r}")
    if n < 1:
        raise argparse.ArgumentTypeError(f"expected a positive number of worker processes, got {n}")
    return n


def build_parser():
    # the common options, accepted before and after the command
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true", default=argparse.SUPPRESS,
                        help="no progress output")
    p = argparse.ArgumentParser(prog="braggstrain",
                                description="Strain tensor, lattice rotation and dislocations of a nanocrystal "
                                            "from Bragg coherent diffraction imaging at several reflections.")
    p.add_argument("--version", action="version", version=f"braggstrain {__version__}")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress output")
    sub = p.add_subparsers(dest="command", required=True)

    def add(name, **kw):
        return sub.add_parser(name, parents=[common], **kw)

    s = add("simulate", help="simulate the scans a pipeline file describes ([simulate] table)")
    s.add_argument("config", help="pipeline file (TOML)")
    s.add_argument("--out", required=True, help="output folder for scan files, truth.h5 and pipeline.toml")
    s.set_defaults(func=cmd_simulate)

    s = add("inspect", help="describe a scan, raw and after preparation: a scan file, a frames "
                            "file/folder/pattern, or a pipeline file and a reflection")
    s.add_argument("file", help="braggstrain scan file, frames source (HDF5 'file.h5#/path', EDF, CBF, TIFF, "
                                "folder, glob pattern) or pipeline file (TOML)")
    s.add_argument("--reflection", default=None, help="with a pipeline file: the reflection's name (default: all)")
    s.add_argument("--config", default=None,
                   help="with a scan file: the pipeline file whose [prepare] options the preparation uses "
                        "(default: the options' defaults)")
    s.set_defaults(func=cmd_inspect)

    def add_exec(sp):
        sp.add_argument("--resume", action="store_true", help="reuse checkpoints whose inputs did not change")
        sp.add_argument("--scheduler", default=None,
                        help="run phase retrieval on Dask: 'local' starts a LocalCluster, else a scheduler address")
        sp.add_argument("--workers", type=_positive_int, default=None,
                        help="worker processes, at least 1 (default: all cores)")

    s = add("demo", help="simulate the built-in demo crystal and run the whole pipeline on it")
    s.add_argument("out", help="output folder")
    add_exec(s)
    s.set_defaults(func=cmd_demo)

    s = add("run", help="run the pipeline a pipeline file describes")
    s.add_argument("config", help="pipeline file (TOML)")
    s.add_argument("--out", required=True, help="output folder")
    add_exec(s)
    s.set_defaults(func=cmd_run)

    s = add("prepare", help="prepare every scan of a pipeline file and write it to HDF5")
    s.add_argument("config", help="pipeline file (TOML)")
    s.add_argument("--out", required=True, help="output folder")
    s.set_defaults(func=cmd_prepare)

    s = add("report", help="rebuild the figures and the HTML report from a results file")
    s.add_argument("results", help="results.h5")
    s.add_argument("--out", default=None, help="output folder (default: beside the results file)")
    s.set_defaults(func=cmd_report)

    s = add("export", help="export a results file for other programs")
    s.add_argument("results", help="results.h5")
    s.add_argument("--vtk", action="store_true", help="VTK ImageData (.vti) files for ParaView")
    s.add_argument("--out", default=None, help="output folder (default: vtk/ beside the results file)")
    s.set_defaults(func=cmd_export)

    s = add("plan", help="plan which reflections to measure, at which angles")
    s.add_argument("config", help="pipeline file (TOML) with [crystal], [instrument] and [plan]")
    s.add_argument("--out", default=None, help="folder for the figure and the pipeline fragment (default: ./plan)")
    s.set_defaults(func=cmd_plan)
    return p


def _stdout_gone():
    """stdout's reader went away (``| head``): say nothing more, as command-line
    tools do; later writes and the final flush go to /dev/null."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):  # pragma: no cover - stdout without a descriptor
        pass
    return 1


def main(argv=None):
    parser = build_parser()
    program = argv is None  # called as the program itself, not from Python
    argv = sys.argv[1:] if argv is None else list(argv)
    args = parser.parse_args(argv)
    if not hasattr(args, "quiet"):
        args.quiet = False
    args.command_line = shlex.join(["braggstrain", *argv])
    try:
        return int(args.func(args) or 0)
    except BrokenPipeError:
        return _stdout_gone()
    except InputError as e:
        print(f"braggstrain: error: {e}", file=sys.stderr)
        return 2
    except BraggStrainError as e:
        print(f"braggstrain: failed: {e}", file=sys.stderr)
        if getattr(e, "unclean_exit", False) and program:
            # HDF5 holds a file it could not flush (full disk) and may crash at
            # exit: leave now, the message said everything (outputs are closed)
            sys.stdout.flush()
            sys.stderr.flush()
            os._exit(1)
        return 1
    except KeyboardInterrupt:
        print("braggstrain: interrupted", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
