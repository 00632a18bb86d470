"""Accuracy of phase retrieval on soft-edged crystals, over many random starts.

The crystal is an invented one made with the project's simulator: a
truncated octahedron (rotated, so its facets are not along the array axes)
whose density is blurred by a Gaussian of ``--edge`` voxels (the soft edge
that resolution gives every real crystal), with a smooth phase that varies
by several radians across it, at an oversampling of about 3, and a detector
gap of two columns (masked) next to the Bragg peak.

Cases (``--case``):

* ``clean``: noise-free intensity; one ``reconstruct`` per seed; the line
  ``success_rate=<k>/<n> (complex error <= 1 %)`` and the errors;
* ``noisy``: Poisson counts at ``--peak`` counts in the brightest voxel; one
  ``ensemble`` (``--runs`` starts, best ``--keep`` averaged) against the
  noise floor, the error of a run started from the true object running the
  closing stages of the default plan (stages 3 and 4) on the same counts;
  the line ``ensemble/noise_floor=<ratio>``;
* ``ceiling``: what the support alone can give on the noise-free data,
  without any support rule: for each ``--thresholds`` value t, the *true*
  support (voxels above t of the maximum density, held fixed) is used (a)
  from the true object (ER only: how far the truth itself moves on that
  support) and (b) from ``--seeds`` random starts (600 HIO, then
  ``--average`` HIO iterations averaged when that is > 0, then ER); the
  errors and the final misfits; ``--extra-er`` continues each random start
  with more ER iterations on the same support and ``--lbfgs`` minimises the
  same amplitude misfit from its end state with L-BFGS (scipy.optimize): is
  the gap to the truth slow convergence, or a point the iterations cannot
  leave?
* ``conditioning``: why random starts stop short of the truth on a loose
  support.  For each ``--thresholds`` value, the Gauss-Newton matrix J^T J
  of the amplitude misfit at the true object (J the derivative of the
  measured moduli |F x| with respect to the real and imaginary parts of x on
  the true support) is built column by column and diagonalised; its
  smallest eigenvalues (1 = a unit change of the object changes the moduli
  by as much) are the directions the data hardly constrain.  With
  ``--seeds`` > 0 the random starts of ``ceiling`` are aligned to the first
  and averaged, and the share of the mean's error that lies in the weak
  directions (eigenvalue < ``--weak``) is printed;
* ``blurred``: the noise-free intensity convolved with a Gaussian coherence
  function (``--blur`` sigma(s) in voxels, ``--blur-rotation`` a rotation
  vector for axes that are not the array axes), phased with and without the
  partial-coherence model; errors, support sizes and the estimated kernel
  widths along their principal axes.

The complex error is the one of :func:`braggstrain.phasing.complex_error`
(sub-voxel shift, twin and global phase aligned) against the truth with the
same phase ramp removed.  This is a measurement, not a test: it takes
minutes.

Usage::

    python benchmarks/phasing_accuracy.py --case clean --seeds 10 --size 48
    python benchmarks/phasing_accuracy.py --case noisy --seeds 2
    python benchmarks/phasing_accuracy.py --case ceiling --crystal small --frac 0.4 --size 40 --seeds 3
    python benchmarks/phasing_accuracy.py --case ceiling --crystal small --frac 0.4 --size 40 \
        --thresholds 0.001 --seeds 3 --extra-er 800 4800 --lbfgs 1000
    python benchmarks/phasing_accuracy.py --case conditioning --crystal small --frac 0.4 --size 40 \
        --thresholds 0.2 0.01 0.001 --seeds 8
    python benchmarks/phasing_accuracy.py --case blurred --blur 1.0 --seeds 2
    python benchmarks/phasing_accuracy.py --case blurred --blur 0.5 --ensemble --runs 6 --keep 3
    python benchmarks/phasing_accuracy.py --case blurred --crystal small --size 40 --counted \
        --blur 1.0 --ensemble --runs 6 --keep 3 --coherence false auto
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np


def soft_crystal(n, edge=0.6, phase_span=4.5):
    """Complex object (complex64, centred at n//2) of the soft-edged test crystal."""
    import scipy.ndimage

    from braggstrain.geometry.rotation import rotation_from_rotvec
    from braggstrain.simulate import forward

    shape = (n, n, n)
    vs = 10.0
    rot = rotation_from_rotvec(np.array([0.3, -0.2, 0.45]))
    dens = forward.truncated_octahedron(shape, vs, size=0.5 * n * vs, truncation=0.7,
                                        supersample=2, rotation=rot)
    dens = scipy.ndimage.gaussian_filter(dens.astype(np.float64), edge)
    r = forward.grid_coordinates(shape, vs)
    length = n * vs / 4
    c = np.random.default_rng(0).uniform(-0.4, 0.4, 3) * length
    bump = np.exp(-((r[0] - c[0]) ** 2 + (r[1] - c[1]) ** 2 + (r[2] - c[2]) ** 2)
                  / (2 * (0.9 * length) ** 2))
    phase = phase_span * (bump - 0.5) + 0.8 * (r[0] / length) * (r[1] / length)
    return (dens * np.exp(1j * phase)).astype(np.complex64)


def small_crystal(n, frac=0.3, edge=0.6, span=3.0):
    """A smaller soft-edged crystal (``frac`` of the array across, oversampling
    about 1/frac) with a 3 rad phase bump: the 40^3 case of docs/phasing.md,
    "Partial coherence: measured"."""
    import scipy.ndimage

    from braggstrain.geometry.rotation import rotation_from_rotvec
    from braggstrain.simulate import forward

    shape = (n, n, n)
    vs = 10.0
    rot = rotation_from_rotvec(np.array([0.3, -0.2, 0.45]))
    dens = forward.truncated_octahedron(shape, vs, size=frac * n * vs, truncation=0.7, supersample=2,
                                        rotation=rot)
    dens = scipy.ndimage.gaussian_filter(dens.astype(np.float64), edge)
    r = forward.grid_coordinates(shape, vs)
    L = frac * n * vs / 2
    phase = (span * np.exp(-((r[0] - 0.2 * L) ** 2 + (r[1] + 0.1 * L) ** 2 + r[2] ** 2) / (2 * L ** 2))
             + 0.5 * (r[0] / L) * (r[1] / L))
    return (dens * np.exp(1j * phase)).astype(np.complex64)


def gap_mask(n):
    """Two masked detector columns, 3 and 4 voxels from the peak along axis 2."""
    mask = np.zeros((n, n, n), bool)
    mask[:, :, n // 2 + 3:n // 2 + 5] = True
    return mask


def gaussian_coherence_kernel(sigmas, rotvec=(0.0, 0.0, 0.0), half_width=6):
    """The simulator's Gaussian coherence function (:func:`braggstrain.simulate.forward.gaussian_coherence_kernel`)."""
    from braggstrain.simulate.forward import gaussian_coherence_kernel as kernel

    return kernel(sigmas, rotvec, half_width)


def _in_fft_order(obj):
    import scipy.fft

    return scipy.fft.ifftshift(np.asarray(obj, dtype=np.complex128))


def _moduli(intensity, mask):
    """Measured moduli (FFT order, unitary FFT) and the measured voxels."""
    import scipy.fft

    n_vox = intensity.size
    amp = np.sqrt(scipy.fft.ifftshift(intensity) / n_vox)
    measured = np.ones(intensity.shape, bool) if mask is None else ~scipy.fft.ifftshift(mask)
    return amp, measured


def lbfgs_polish(obj, support, intensity, mask, iterations):
    """Minimise sum over measured voxels of (|F x| - sqrt(I))^2 over the complex x on
    ``support`` (centred layout) with L-BFGS, from ``obj``; the gradient is
    2 (x - P_M x) on the support (unitary F).  Returns (object, relative misfit)."""
    import scipy.fft
    import scipy.optimize

    amp, measured = _moduli(intensity, mask)
    sup = scipy.fft.ifftshift(support)
    idx = np.flatnonzero(sup)
    m = idx.size

    def unpack(v):
        x = np.zeros(sup.shape, np.complex128)
        x.flat[idx] = v[:m] + 1j * v[m:]
        return x

    def value_and_gradient(v):
        f = scipy.fft.fftn(unpack(v), norm="ortho")
        mod = np.maximum(np.abs(f), 1e-300)
        r = np.where(measured, mod - amp, 0.0)
        g = 2 * scipy.fft.ifftn(r * f / mod, norm="ortho").flat[idx]
        return float((r ** 2).sum()), np.concatenate([g.real, g.imag])

    x0 = _in_fft_order(obj).flat[idx]
    res = scipy.optimize.minimize(value_and_gradient, np.concatenate([x0.real, x0.imag]), jac=True,
                                  method="L-BFGS-B", options={"maxiter": iterations, "maxcor": 20,
                                                              "ftol": 1e-20, "gtol": 1e-18})
    misfit = res.fun / float((amp[measured] ** 2).sum())
    return scipy.fft.fftshift(unpack(res.x)), misfit


def gauss_newton_spectrum(obj, support, mask):
    """Eigenvalues and eigenvectors of J^T J at ``obj`` (centred layout) for the
    measured moduli of its own far field; J has one column per real and per
    imaginary part of a voxel of ``support`` (unitary FFT)."""
    import scipy.fft

    x = _in_fft_order(obj)
    f = scipy.fft.fftn(x, norm="ortho")
    u = f / np.maximum(np.abs(f), 1e-300)
    measured = np.ones(x.shape, bool) if mask is None else ~scipy.fft.ifftshift(mask)
    u = np.where(measured, u, 0)
    idx = np.flatnonzero(scipy.fft.ifftshift(support))
    m = idx.size
    # Column k of J^T J is J^T (J e_k): J e = Re(conj(u) F e) on the measured
    # voxels, J^T r = (Re, Im) of F^H(u r) on the support.
    normal = np.empty((2 * m, 2 * m))
    d = np.zeros(x.shape, np.complex128)
    for k in range(2 * m):
        d.flat[idx[k % m]] = 1.0 if k < m else 1j
        back = scipy.fft.ifftn(u * (np.conj(u) * scipy.fft.fftn(d, norm="ortho")).real,
                               norm="ortho").flat[idx]
        normal[:m, k], normal[m:, k] = back.real, back.imag
        d.flat[idx[k % m]] = 0
    w, v = np.linalg.eigh(normal)
    return w, v, idx


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--case", choices=("clean", "noisy", "ceiling", "conditioning", "blurred"),
                    default="clean")
    ap.add_argument("--size", type=int, default=48)
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument("--edge", type=float, default=0.6, help="Gaussian blur of the density, voxels")
    ap.add_argument("--phase-span", type=float, default=4.5, help="amplitude of the phase bump, rad")
    ap.add_argument("--peak", type=float, default=1e5, help="(noisy) counts in the brightest voxel")
    ap.add_argument("--runs", type=int, default=4)
    ap.add_argument("--keep", type=int, default=3)
    ap.add_argument("--blur", type=float, nargs="+", default=[1.0],
                    help="(blurred) sigma of the coherence function, one or three values, "
                         "voxels; 0 for coherent data")
    ap.add_argument("--blur-rotation", type=float, nargs=3, default=[0.0, 0.0, 0.0])
    ap.add_argument("--ensemble", action="store_true",
                    help="(blurred) one ensemble (--runs, --keep, seed 1) instead of single runs")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--crystal", choices=("soft", "small"), default="soft",
                    help="the soft-edged crystal half the array across, or the small one (--frac)")
    ap.add_argument("--frac", type=float, default=0.3,
                    help="(small crystal) its size as a fraction of the array (oversampling about 1/frac)")
    ap.add_argument("--no-gap", action="store_true", help="no masked detector columns")
    ap.add_argument("--free-fraction", type=float, default=0.03,
                    help="(clean, ceiling) fraction of measured voxels held out")
    ap.add_argument("--average", type=int, default=0,
                    help="(ceiling) iterations of an averaged HIO stage before the closing ER")
    ap.add_argument("--thresholds", type=float, nargs="+", default=[0.2, 0.03, 0.01, 0.001],
                    help="(ceiling) thresholds of the true support, fractions of the maximum density")
    ap.add_argument("--extra-er", type=int, nargs="+", default=[],
                    help="(ceiling) total ER iterations after the search at which the random "
                         "starts' error is printed again, e.g. 800 4800")
    ap.add_argument("--lbfgs", type=int, default=0,
                    help="(ceiling) L-BFGS iterations on the amplitude misfit from each random "
                         "start's end state")
    ap.add_argument("--weak", type=float, default=1e-4,
                    help="(conditioning) eigenvalue below which a direction counts as weak")
    ap.add_argument("--counted", action="store_true",
                    help="(blurred) Poisson counts at --peak in the brightest voxel (seed 50 + --seed)")
    ap.add_argument("--seed", type=int, default=1, help="(blurred --ensemble) the ensemble's seed")
    ap.add_argument("--coherence", nargs="+", default=["false", "true", "auto"],
                    help="(blurred --ensemble) the models to run: false, true, auto")
    args = ap.parse_args(argv)

    from scipy.ndimage import convolve

    from braggstrain.phasing import PhasingStage, complex_error, default_plan, ensemble, reconstruct
    from braggstrain.phasing.metrics import far_field, remove_phase_ramp

    n = args.size
    obj = (soft_crystal(n, args.edge, args.phase_span) if args.crystal == "soft"
           else small_crystal(n, args.frac, args.edge))
    mask = None if args.no_gap else gap_mask(n)
    clean = np.abs(far_field(obj).astype(np.complex128)) ** 2
    amp = np.abs(obj)
    from braggstrain.prepare.oversampling import estimate_oversampling

    print(f"crystal {n}^3: {int((amp > 0.2 * amp.max()).sum())} voxels above 20 % of the "
          f"maximum density, edge {args.edge} voxel, phase span inside "
          f"{np.ptp(np.angle(obj[amp > 0.5 * amp.max()])):.2f} rad, oversampling "
          + ", ".join(f"{r:.2f}" for r in estimate_oversampling(clean, mask=mask)), flush=True)

    def err(o, ramp, truth=obj):
        return complex_error(o, remove_phase_ramp(truth, ramp))

    if args.case == "clean":
        errors = []
        for s in range(args.seeds):
            t0 = time.perf_counter()
            rec = reconstruct(clean, mask, seed=s, threads=args.threads, raise_on_failure=False,
                              free_fraction=args.free_fraction)
            e = err(rec.obj, rec.ramp) if rec.ok else float("nan")
            errors.append(e)
            print(f"seed {s}: {rec.status}, complex error {e:.4f}, support {rec.metrics.support_size}, "
                  f"misfit {rec.metrics.amplitude_error:.2e}, {time.perf_counter() - t0:.1f} s",
                  flush=True)
        e = np.asarray(errors)
        print(f"errors {np.nanmin(e):.4f}-{np.nanmax(e):.4f}, median {np.nanmedian(e):.4f}")
        print(f"success_rate={int(np.sum(e <= 0.01))}/{len(e)} (complex error <= 1 %)")
    elif args.case == "noisy":
        scale = args.peak / clean.max()
        truth = obj * np.float32(np.sqrt(scale))
        ratios = []
        for s in range(args.seeds):
            counts = np.random.default_rng(100 + s).poisson(clean * scale).astype(np.float64)
            res = ensemble(counts, mask, runs=args.runs, keep=args.keep, seed=s, threads=args.threads,
                           coherence=False)
            floor_run = reconstruct(counts, mask, start=remove_phase_ramp(truth, res.ramp),
                                    plan=default_plan()[2:], seed=s, threads=args.threads)
            floor = err(floor_run.obj, floor_run.ramp, truth)
            e_avg = err(res.obj, res.ramp, truth)
            e_best = err(res.best.obj, res.best.ramp, truth)
            ratios.append(e_avg / floor)
            print(f"seed {s}: noise floor {floor:.4f}, ensemble average {e_avg:.4f}, best run "
                  f"{e_best:.4f}, kept {res.kept}, outliers {sorted(res.outliers)}", flush=True)
        print(f"ensemble/noise_floor={max(ratios):.3f} (worst of {len(ratios)})")
    elif args.case in ("ceiling", "conditioning"):
        polish = [PhasingStage("ER", 200, None, "none")]
        search = [PhasingStage("HIO", 600, 0.9, "none")]
        if args.average:
            search.append(PhasingStage("HIO", args.average, 0.9, "none", average=True))
        search.append(PhasingStage("ER", 200 if not args.average else 100, None, "none"))
        # The random starts stay in the frame of the data (no centring, no ramp
        # removal) so that they can be continued; err() aligns them anyway.
        fixed = {"threads": args.threads, "free_fraction": args.free_fraction, "center": False,
                 "remove_ramp": False}
        zero = np.zeros(3)
        for t in args.thresholds:
            support = amp > t * amp.max()
            outside = float((amp[~support] ** 2).sum() / (amp ** 2).sum())
            rec = reconstruct(clean, mask, support=support, start=obj * support, plan=polish, seed=0,
                              threads=args.threads, remove_ramp=False, free_fraction=args.free_fraction)
            line = (f"support above {t:g} of the maximum: {int(support.sum())} voxels, "
                    f"{outside:.1e} of |rho|^2 outside; from the truth: complex error "
                    f"{err(rec.obj, zero):.4f} misfit {rec.metrics.amplitude_error:.1e}")
            if args.case == "conditioning":
                t0 = time.perf_counter()
                w, vecs, idx = gauss_newton_spectrum(obj * support, support, mask)
                weak = w < args.weak
                line += ("; J^T J at the truth: smallest eigenvalues "
                         + ", ".join(f"{v:.1e}" for v in w[:6])
                         + f", {int(weak.sum())} below {args.weak:g} of {w.size}, largest {w[-1]:.3f} "
                         f"({time.perf_counter() - t0:.0f} s)")
            starts, ends = [], []
            for s in range(args.seeds):
                rec = reconstruct(clean, mask, support=support, plan=search, seed=s, **fixed)
                entry = f"{err(rec.obj, zero):.4f} ({rec.metrics.amplitude_error:.1e})"
                done, cur = 0, rec
                for total in args.extra_er:
                    cur = reconstruct(clean, mask, support=support, start=cur.obj, seed=s,
                                      plan=[PhasingStage("ER", total - done, None, "none")], **fixed)
                    done = total
                    entry += f" -> ER {total}: {err(cur.obj, zero):.4f} ({cur.metrics.amplitude_error:.1e})"
                if args.lbfgs:
                    polished, misfit = lbfgs_polish(rec.obj, support, clean, mask, args.lbfgs)
                    entry += (f" | L-BFGS {args.lbfgs} from ER 200: {err(polished.astype(np.complex64), zero):.4f}"
                              f" ({misfit:.1e})")
                starts.append(entry)
                ends.append(rec.obj)
            print(line + "; random starts: " + ", ".join(starts), flush=True)
            if args.case == "conditioning" and ends:
                from braggstrain.phasing.metrics import align

                mean = np.mean([ends[0]] + [align(e, ends[0])[0] for e in ends[1:]], axis=0)
                aligned = np.asarray(align(mean, obj)[0], dtype=np.complex128)
                scale = abs(np.vdot(aligned, obj)) / np.vdot(aligned, aligned).real
                diff = _in_fft_order(scale * aligned - obj).flat[idx]
                c = vecs.T @ np.concatenate([diff.real, diff.imag])
                print(f"  mean of the {len(ends)} random starts (aligned to the first): complex error "
                      f"{err(mean.astype(np.complex64), zero):.4f}; share of its squared error in the "
                      f"{int(weak.sum())} weak directions {float((c[weak] ** 2).sum() / (c ** 2).sum()):.2f}",
                      flush=True)
    else:
        if max(args.blur) > 0:
            kernel = gaussian_coherence_kernel(args.blur if len(args.blur) == 3 else args.blur[0],
                                               args.blur_rotation)
            blurred = convolve(clean, kernel, mode="wrap")
        else:  # --blur 0: the coherent data, for comparison
            blurred = clean
        truth = obj
        if args.counted:
            scale = args.peak / blurred.max()
            blurred = np.random.default_rng(args.seed + 50).poisson(blurred * scale).astype(np.float64)
            truth = obj * np.float32(np.sqrt(scale))
        if args.ensemble:
            for name in args.coherence:
                coherence = {"false": False, "true": True}.get(name, name)
                t0 = time.perf_counter()
                res = ensemble(blurred, mask, runs=args.runs, keep=args.keep, seed=args.seed,
                               coherence=coherence, threads=args.threads)
                e = err(res.obj, res.ramp, truth)
                widths = ("" if res.coherence_widths is None else
                          " kernel widths " + ", ".join(f"{w:.2f}" for w in res.coherence_widths))
                ch = res.coherence_choice
                choice = (f", free NLL coherent {ch['coherent']:.3f} partial {ch['partial']:.3f}" if ch else "")
                print(f"ensemble coherence={name}: complex error {e:.4f}, support "
                      f"{int(res.support.sum())}, model {res.coherence_model}, kept {res.kept}, outliers "
                      f"{sorted(res.outliers)}{widths}{choice}, {time.perf_counter() - t0:.0f} s", flush=True)
            return 0
        for coherence in (False, True):
            for s in range(args.seeds):
                rec = reconstruct(blurred, mask, seed=s, coherence=coherence, threads=args.threads,
                                  raise_on_failure=False)
                e = err(rec.obj, rec.ramp) if rec.ok else float("nan")
                widths = ("" if rec.coherence_widths is None else
                          " kernel widths " + ", ".join(f"{w:.2f}" for w in rec.coherence_widths))
                print(f"coherence={coherence} seed {s}: {rec.status}, complex error {e:.4f}, "
                      f"support {rec.metrics.support_size}{widths}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
