"""Speed and memory of the phasing loop against its limits.

Builds an invented crystal on an N^3 grid with the project's simulator, then
in one run times

* the engine: a fixed number of HIO iterations with shrink-wrap every 20
  (braggstrain.phasing.reconstruct, loop time only), best of ``--repeats``
  runs, with the default estimated FFT plans (``fft_effort="FFTW_ESTIMATE"``,
  reproducible) and with measured plans (``"FFTW_MEASURE"``);
* one forward + inverse FFT pair on an N^3 complex64 array with the fastest
  backend and plans available (pyFFTW with measured plans: the limit, an
  iteration cannot beat its two FFTs), best of ``--repeats`` timings taken
  between the engine runs, and the same pair with estimated plans;
* a plain numpy reference of the same algorithm written the obvious way
  (np.fft, whole-array expressions, scipy.ndimage.gaussian_filter for the
  shrink-wrap blur);

and the peak memory growth of the engine run (resident set, reset before the
run through /proc/self/clear_refs; tracemalloc where that is unavailable).

Usage::

    python benchmarks/phasing.py --size 128 [--iterations 100] [--threads 2]

The line before the last compares the two planner efforts,
``estimate/measure=<engine ratio> fft_pair_estimate/measure=<pair ratio>``;
the last line printed is exactly
``iteration/fft_pair=<x> speedup_vs_numpy=<y> peak_arrays=<z>``, for the
default (estimated) plans over the fastest (measured) FFT pair.
This is a benchmark, not a test: the numbers depend on the machine and on
what else runs on it.
"""

from __future__ import annotations

import argparse
import gc
import os
import sys
import time
import tracemalloc

import numpy as np


def crystal_intensity(n):
    """Intensity of an invented faceted crystal with a smooth phase on an n^3 grid."""
    from braggstrain.phasing.metrics import far_field
    from braggstrain.simulate import forward

    shape = (n, n, n)
    vs = 10.0
    density = forward.truncated_octahedron(shape, vs, size=0.5 * n * vs, truncation=0.7)
    r = forward.grid_coordinates(shape, vs)
    length = n * vs / 4
    u = np.zeros((3,) + shape, dtype=np.float32)
    u[2] = 1.0 * np.exp(-((r[0] - 0.3 * length) ** 2 + r[1] ** 2 + r[2] ** 2) / (2 * length ** 2))
    del r
    obj = forward.complex_object(density, u, (0.0, 0.0, np.pi))
    del u, density
    return (np.abs(far_field(obj)) ** 2).astype(np.float32)


def _rss_kib(field):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise KeyError(field)


def _reset_peak_rss():
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def numpy_reference(intensity, iterations, beta=0.9, every=20, sigma=3.0, threshold=0.15):
    """HIO with shrink-wrap the obvious way; returns seconds per iteration."""
    import scipy.ndimage

    amp = np.sqrt(np.fft.ifftshift(intensity)).astype(np.float32)
    ac = np.abs(np.fft.ifftn(amp ** 2))
    support = ac > 0.04 * ac.max()
    rng = np.random.default_rng(0)
    x = np.fft.ifftn(amp * np.exp(2j * np.pi * rng.random(amp.shape))).astype(np.complex64)
    x *= support
    t0 = time.perf_counter()
    for it in range(iterations):
        psi = np.fft.fftn(x)
        psi = amp * np.exp(1j * np.angle(psi))
        p = np.fft.ifftn(psi)
        x = np.where(support, p, x - beta * p).astype(np.complex64)
        if (it + 1) % every == 0:
            blurred = scipy.ndimage.gaussian_filter(np.abs(x * support), sigma)
            support = blurred >= threshold * blurred.max()
    return (time.perf_counter() - t0) / iterations


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--size", type=int, default=128, help="array size N (N^3 voxels)")
    ap.add_argument("--iterations", type=int, default=100, help="engine HIO iterations")
    ap.add_argument("--numpy-iterations", type=int, default=20,
                    help="iterations of the numpy reference (includes one shrink-wrap at 20)")
    ap.add_argument("--threads", type=int, default=None, help="threads (default: all cores)")
    ap.add_argument("--repeats", type=int, default=3,
                    help="engine runs and FFT-pair timings alternated; the best of each is kept")
    args = ap.parse_args(argv)
    n = args.size
    if n < 16:
        ap.error("--size: expected at least 16")

    from braggstrain.phasing import FFTBackend, PhasingStage, default_threads, reconstruct

    threads = args.threads or default_threads()
    print(f"size {n}^3, threads {threads}, cores {default_threads()}, "
          f"OMP_WAIT_POLICY={os.environ.get('OMP_WAIT_POLICY')}", flush=True)
    intensity = crystal_intensity(n)
    plan = [PhasingStage("HIO", args.iterations, 0.9, "shrinkwrap", 20, (3.0, 1.0), 0.15)]

    # warm up: kernels compiled/loaded, FFTW wisdom for this size gathered
    reconstruct(crystal_intensity(16), plan=[PhasingStage("HIO", 2, 0.9, "shrinkwrap", 1)], seed=0,
                threads=threads, raise_on_failure=False)
    for effort in ("FFTW_ESTIMATE", "FFTW_MEASURE"):
        fft = FFTBackend(intensity.shape, threads=threads, effort=effort)
        fft.real_buffer  # the shrink-wrap's real transforms
    del fft
    gc.collect()

    # engine runs (the first one also gives the peak memory growth) alternating
    # with FFT-pair timings; the minimum of each over the repeats is kept, the
    # usual estimator when other jobs share the machine.
    array_bytes = n ** 3 * np.dtype(np.complex64).itemsize
    iter_times, pair_times = [], []
    measured_iter, estimated_pair = [], []
    growth = None
    fft = None
    fft_est = None
    for rep in range(args.repeats):
        if rep == 0:
            use_rss = _reset_peak_rss()
            rss0 = _rss_kib("VmRSS")
            if not use_rss:
                tracemalloc.start()
        rec = reconstruct(intensity, plan=plan, seed=0, threads=threads, raise_on_failure=False)
        if rep == 0:
            if use_rss:
                growth = (_rss_kib("VmHWM") - rss0) * 1024
                how = "resident set (VmHWM)"
            else:
                growth = tracemalloc.get_traced_memory()[1]
                tracemalloc.stop()
                how = "tracemalloc"
            print(f"engine peak memory growth: {growth / 2 ** 20:.1f} MiB by {how}", flush=True)
        t_iter = rec.timings["iterations"] / rec.iterations
        iter_times.append(t_iter)
        print(f"engine run {rep}: {rec.iterations} HIO iterations, {1e3 * t_iter:.2f} ms/iteration "
              f"(setup {rec.timings['setup']:.2f} s, finish {rec.timings['finish']:.2f} s), "
              f"backend {rec.fft_backend}, status {rec.status}", flush=True)
        del rec
        gc.collect()
        rec = reconstruct(intensity, plan=plan, seed=0, threads=threads, raise_on_failure=False,
                          fft_effort="FFTW_MEASURE")
        measured_iter.append(rec.timings["iterations"] / rec.iterations)
        print(f"engine run {rep} with measured plans: {1e3 * measured_iter[-1]:.2f} ms/iteration",
              flush=True)
        del rec
        gc.collect()

        # FFT pair on an N^3 complex64 array: fastest backend, measured plans
        # (the denominator), and the default estimated plans for comparison
        if fft is None:
            fft = FFTBackend(intensity.shape, threads=threads, effort="FFTW_MEASURE")
            fft_est = FFTBackend(intensity.shape, threads=threads, effort="FFTW_ESTIMATE")
            for f in (fft, fft_est):
                f.buffer[...] = np.sqrt(intensity)
                f.forward()
                f.backward()
        reps = max(5, int(2.0 / max(t_iter, 1e-4)))
        for f, times in ((fft, pair_times), (fft_est, estimated_pair)):
            t0 = time.perf_counter()
            for _ in range(reps):
                f.forward()
                f.backward()
                f.buffer *= np.float32(1.0 / f.size)  # keeps the values bounded
            t_pair_loop = (time.perf_counter() - t0) / reps
            # time the scaling pass alone and take it out: the pair is the two FFTs
            t0 = time.perf_counter()
            for _ in range(reps):
                f.buffer *= np.float32(1.0)
            t_scale = (time.perf_counter() - t0) / reps
            times.append(max(t_pair_loop - t_scale, 1e-9))
        print(f"fft pair ({fft.name}) {rep}: {1e3 * pair_times[-1]:.2f} ms measured plans, "
              f"{1e3 * estimated_pair[-1]:.2f} ms estimated plans", flush=True)
    del fft, fft_est
    gc.collect()
    t_iter = min(iter_times)
    t_pair = min(pair_times)
    print(f"best of {args.repeats}: {1e3 * t_iter:.2f} ms/iteration, fft pair {1e3 * t_pair:.2f} ms",
          flush=True)

    t_meas = min(measured_iter)
    print(f"best of {args.repeats} with measured plans: {1e3 * t_meas:.2f} ms/iteration, "
          f"fft pair {1e3 * min(estimated_pair):.2f} ms with estimated plans", flush=True)
    t_np = numpy_reference(intensity, args.numpy_iterations)
    print(f"numpy reference: {1e3 * t_np:.2f} ms/iteration", flush=True)
    print(f"estimate/measure={t_iter / t_meas:.3f} "
          f"fft_pair_estimate/measure={min(estimated_pair) / t_pair:.3f}")
    print(f"iteration/fft_pair={t_iter / t_pair:.3f} speedup_vs_numpy={t_np / t_iter:.2f} "
          f"peak_arrays={growth / array_bytes:.2f}")


if __name__ == "__main__":
    sys.exit(main())
