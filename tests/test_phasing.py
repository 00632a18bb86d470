"""Unit checks of the phasing engine: FFT backends, kernels, plan, inputs.

Each check names its reference beside it.
"""

import tomllib
import warnings

import numpy as np
import pytest
import scipy.fft
import scipy.ndimage
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from braggstrain.errors import BraggStrainError, ConfigError, InputError, PhasingError
from braggstrain.phasing import (OversamplingWarning, PhasingStage, default_plan, plan_from_config,
                                 plan_to_config, reconstruct)
from braggstrain.phasing import fft as pfft
from braggstrain.phasing import kernels as K
from braggstrain.phasing.coherence import (CoherenceModel, CoherenceSettings, gaussian_kernel,
                                           kernel_sigma)
from braggstrain.phasing.metrics import (centre_of_mass_shift, far_field, peak_offset, poisson_nll,
                                         prtf, remove_phase_ramp, twin)
from braggstrain.phasing.schedule import options_from_config
from braggstrain.phasing.support import shrinkwrap
from braggstrain.prepare.oversampling import estimate_oversampling

from test_phasing_helpers import clean_intensity, crystal

SHORT = [PhasingStage("HIO", 40, 0.9, "shrinkwrap", 20, (2.0, 1.0), 0.15), PhasingStage("ER", 20, None, "none")]


# --------------------------------------------------------------------- FFT

@pytest.mark.skipif(not pfft.HAVE_PYFFTW, reason="pyFFTW not installed")
@pytest.mark.parametrize("shape", [(32, 32, 32), (30, 24, 36)])
def test_pyfftw_agrees_with_scipy_fft(shape):
    # Reference library: scipy.fft (forward unnormalised, inverse with 1/N).
    rng = np.random.default_rng(0)
    a = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(np.complex64)
    be = pfft.FFTBackend(shape, threads=2, backend="pyfftw")
    buf = be.buffer
    buf[...] = a
    be.forward()
    assert be.buffer is buf  # transformed in place
    ref = scipy.fft.fftn(a.astype(np.complex128))
    assert np.linalg.norm(buf - ref) / np.linalg.norm(ref) < 1e-5
    be.backward()
    ref_back = scipy.fft.ifftn(ref) * a.size  # the backend omits the 1/N
    assert np.linalg.norm(buf - ref_back) / np.linalg.norm(ref_back) < 1e-5


def test_scipy_backend_matches_scipy_fft():
    # Reference library: scipy.fft.
    rng = np.random.default_rng(1)
    a = (rng.standard_normal((16, 16, 16)) + 1j).astype(np.complex64)
    be = pfft.FFTBackend(a.shape, threads=1, backend="scipy")
    be.buffer[...] = a
    be.forward()
    ref = scipy.fft.fftn(a.astype(np.complex128))
    assert np.linalg.norm(be.buffer - ref) / np.linalg.norm(ref) < 1e-5


@pytest.mark.parametrize("backend", ["pyfftw", "scipy"] if pfft.HAVE_PYFFTW else ["scipy"])
def test_real_transforms_match_scipy_rfftn(backend):
    # Reference library: scipy.fft.rfftn / irfftn (the shrink-wrap blur's transforms).
    rng = np.random.default_rng(6)
    a = rng.standard_normal((20, 16, 24)).astype(np.float32)
    be = pfft.FFTBackend(a.shape, threads=2, backend=backend)
    be.real_buffer[...] = a
    be.real_forward()
    ref = scipy.fft.rfftn(a.astype(np.float64))
    assert be.half_buffer.shape == ref.shape
    assert np.linalg.norm(be.half_buffer - ref) / np.linalg.norm(ref) < 1e-5
    be.real_backward()
    np.testing.assert_allclose(be.real_buffer / a.size, a, atol=1e-5)


@pytest.mark.skipif(not pfft.HAVE_PYFFTW, reason="pyFFTW not installed")
def test_reconstruct_same_with_both_backends():
    # Reference library: scipy.fft as the backend of the same short run.  ER is
    # used because it is contractive: HIO amplifies rounding differences
    # (~1e-7 per FFT) to per-cent level within tens of iterations.
    inten = clean_intensity(32)
    plan = [PhasingStage("ER", 30, None, "shrinkwrap", 15, (2.0, 1.0), 0.15)]
    a = reconstruct(inten, plan=plan, seed=3, threads=1, fft_backend="pyfftw")
    b = reconstruct(inten, plan=plan, seed=3, threads=1, fft_backend="scipy")
    assert (a.fft_backend, b.fft_backend) == ("pyfftw", "scipy")
    assert np.linalg.norm(a.obj - b.obj) / np.linalg.norm(b.obj) < 1e-4


def test_wisdom_round_trip(tmp_path):
    pfft.FFTBackend((16, 16, 16), threads=1)
    path = tmp_path / "w.json"
    pfft.save_wisdom(path)
    if pfft.HAVE_PYFFTW:
        assert path.exists() and pfft.load_wisdom(path)
    (tmp_path / "bad.json").write_text("{}")
    with pytest.raises(InputError, match="bad.json"):
        pfft.load_wisdom(tmp_path / "bad.json")


# ----------------------------------------------------------------- kernels

shapes = st.tuples(st.integers(1, 6), st.integers(1, 6), st.integers(1, 6))


@settings(max_examples=40, deadline=None)
@given(data=st.data(), shape=shapes)
def test_masked_modulus_leaves_masked_voxels_untouched(data, shape):
    # Modulus projection P_M (Fienup, Appl. Opt. 21, 2758 (1982); docs/methods.md):
    # Psi' = A Psi/|Psi| on measured voxels, Psi' = Psi on unmeasured ones.
    floats = st.floats(-1e3, 1e3, allow_nan=False, width=32)
    re = data.draw(hnp.arrays(np.float32, shape, elements=floats))
    im = data.draw(hnp.arrays(np.float32, shape, elements=floats))
    amp = data.draw(hnp.arrays(np.float32, shape, elements=st.floats(0, 1e3, width=32)))
    mask = data.draw(hnp.arrays(np.bool_, shape))
    psi = (re + 1j * im).astype(np.complex64)
    out = psi.copy().reshape(-1)
    folded = np.where(mask, np.float32(-1.0), amp).astype(np.float32).reshape(-1)  # the engine's folding
    K.modulus_step(out, folded, np.float32(1.0))
    out = out.reshape(shape)
    assert np.array_equal(out[mask], psi[mask])  # bit for bit
    meas = ~mask
    mod = np.abs(psi[meas].astype(np.complex128))
    np.testing.assert_allclose(np.abs(out[meas]), amp[meas], rtol=1e-5, atol=1e-3)
    nz = mod > 1e-3
    expect = (amp[meas] * psi[meas] / np.where(mod > 0, mod, 1))[nz]
    np.testing.assert_allclose(out[meas][nz], expect, rtol=1e-4, atol=1e-3)


@pytest.mark.parametrize("algorithm", ["ER", "HIO", "RAAR"])
def test_support_step_matches_textbook_formulas(algorithm):
    # ER and HIO: Fienup, Appl. Opt. 21, 2758 (1982), eqs. for the object-domain
    # update; RAAR: Luke, Inverse Problems 21, 37 (2005), x+ = [b/2 (R_S R_M + I)
    # + (1 - b) P_M] x with R = 2P - I, evaluated here with whole-array operators.
    rng = np.random.default_rng(2)
    n = 500
    x = (rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(np.complex64)
    p = (rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(np.complex64)
    s = rng.random(n) < 0.4
    beta = 0.8
    if algorithm == "ER":
        expect = np.where(s, p, 0)
    elif algorithm == "HIO":
        expect = np.where(s, p, x - beta * p)
    else:
        rm = 2 * p - x                      # R_M x
        rs_rm = 2 * np.where(s, rm, 0) - rm  # R_S R_M x
        expect = beta / 2 * (rs_rm + x) + (1 - beta) * p
    xx, buf = x.copy(), p.copy()
    K.support_step(xx, buf, s, K.ALGORITHM_CODES[algorithm], beta)
    np.testing.assert_allclose(xx, expect, rtol=1e-5, atol=1e-5)
    assert np.array_equal(xx, buf)


def test_shrinkwrap_blur_matches_scipy_gaussian_filter():
    # Reference library: scipy.ndimage.gaussian_filter (periodic boundary).
    rng = np.random.default_rng(4)
    shape = (24, 20, 28)
    obj = np.zeros(shape, np.complex64)
    obj[6:18, 5:15, 8:20] = rng.random((12, 10, 12)) + 0.5
    sup = np.abs(obj) > 0
    sigma, thr = 1.5, 0.2
    ref_blur = scipy.ndimage.gaussian_filter(np.abs(obj).astype(float), sigma, mode="wrap",
                                             truncate=6.0)
    ref = ref_blur >= thr * ref_blur.max()
    be = pfft.FFTBackend(shape, threads=1)
    s = sup.reshape(-1).copy()
    n = shrinkwrap(obj.reshape(-1), s, be, sigma, thr)
    assert n == s.sum()
    # only voxels within rounding of the threshold may differ
    near = np.abs(ref_blur - thr * ref_blur.max()) < 1e-3 * ref_blur.max()
    assert np.array_equal(s.reshape(shape)[~near], ref[~near])


def test_poisson_nll_matches_scipy_stats():
    # Reference library: scipy.stats.poisson.logpmf.
    rng = np.random.default_rng(5)
    model = rng.random((6, 7, 8)) * 20 + 0.1
    counts = rng.poisson(model).astype(float)
    mask = rng.random(model.shape) < 0.2
    ref = -scipy.stats.poisson.logpmf(counts[~mask], model[~mask]).mean()
    # float32 model and amplitudes, as in the runs: measured 5e-10 relative here
    assert poisson_nll(counts, model, mask) == pytest.approx(ref, rel=1e-6)


def test_poisson_nll_is_the_nll_the_runs_record():
    # The run's final nll is the kernel sum over its final far field; the
    # public function gives the same number for that far field (no free
    # voxels, no ramp removal, so |far_field(obj)|² is the run's model).
    inten = clean_intensity(32)
    rec = reconstruct(inten, plan=SHORT, seed=3, free_fraction=0.0, remove_ramp=False)
    model = np.abs(far_field(rec.obj.astype(np.complex128))) ** 2
    # the run's far field is float32: measured 1.5e-6 relative difference
    assert poisson_nll(inten, model) == pytest.approx(rec.metrics.nll, rel=1e-5)


# ------------------------------------------------------------------ metrics

def test_twin_has_the_same_intensity():
    # rho*(-r) <-> conj(Psi(q)) (Fourier transform of a conjugate, inverted
    # function; e.g. Bracewell, The Fourier Transform and Its Applications, 3rd ed.).
    obj = crystal(32)
    np.testing.assert_allclose(np.abs(far_field(twin(obj))), np.abs(far_field(obj)),
                               rtol=1e-4, atol=1e-3)
    assert np.array_equal(twin(twin(obj)), obj)


def test_phase_ramp_moves_the_peak_by_the_offset():
    # Shift theorem of the DFT: multiplying by exp(+2 pi i k0 r / N) rolls the
    # spectrum by k0 (numpy.fft as the reference).
    obj = crystal(32)
    offset = np.array([2.0, -1.0, 3.0])
    ramped = remove_phase_ramp(obj, -offset)
    ref = np.roll(np.abs(far_field(obj)), offset.astype(int), axis=(0, 1, 2))
    np.testing.assert_allclose(np.abs(far_field(ramped)), ref, rtol=1e-3, atol=1e-2 * ref.max())
    # centre of mass of a compact (Gaussian) peak moved by the ramp
    r2 = sum(g ** 2 for g in np.meshgrid(*[np.arange(32) - 16] * 3, indexing="ij"))
    blob = np.exp(-r2 / (2 * 4.0 ** 2)).astype(np.complex64)
    inten = np.abs(far_field(remove_phase_ramp(blob, -offset))) ** 2
    np.testing.assert_allclose(peak_offset(inten), offset, atol=1e-3)


def test_centre_of_mass_shift_handles_wrap():
    w = np.zeros((20, 20, 20))
    w[18:20, 0:3, 9:12] = 1.0  # straddles the edges of axes 0 and 1
    w[0:2, 18:20, 9:12] = 1.0
    shift = centre_of_mass_shift(w)
    rolled = np.roll(w, shift, axis=(0, 1, 2))
    idx = np.argwhere(rolled > 0)
    assert np.allclose(idx.mean(axis=0), [10, 10, 10], atol=0.6)


def test_prtf_of_identical_runs_is_one_everywhere():
    # PRTF definition (Chapman et al., JOSA A 23, 1179 (2006)): identical runs
    # have identical phases, so the mean phasor has modulus 1 at every q.
    obj = crystal(32)
    inten = np.abs(far_field(obj)) ** 2
    res = prtf([obj, obj, obj], inten)
    good = res.counts > 0
    np.testing.assert_allclose(res.values[good], 1.0, atol=1e-5)
    assert np.isnan(res.resolution)


# --------------------------------------------------------------- coherence

def test_kernel_sigma_of_a_gaussian():
    # Second moment of a sampled Gaussian = sigma^2 (analytic, sigma >= 0.7 voxel
    # so the sampling error is far below 1 %).
    k = gaussian_kernel((1.0, 0.8, 1.3), 6)
    np.testing.assert_allclose(kernel_sigma(k), (1.0, 0.8, 1.3), rtol=0.01)


def test_principal_widths_of_a_rotated_gaussian():
    # A Gaussian exp(-q^T C^-1 q / 2) has covariance C (definition of the
    # multivariate normal; Bishop, Pattern Recognition and Machine Learning,
    # 2006, section 2.3): its principal widths and axes are the square roots
    # of the eigenvalues and the eigenvectors of C, whatever the rotation.
    from braggstrain.phasing.coherence import kernel_principal_widths
    from braggstrain.geometry.rotation import rotation_from_rotvec

    R = rotation_from_rotvec(np.array([0.5, 0.3, -0.6]))
    sig = np.array([1.2, 0.9, 0.7])
    C = R @ np.diag(sig ** 2) @ R.T
    d = np.arange(-7, 8)
    g = np.stack(np.meshgrid(d, d, d, indexing="ij"), -1).astype(float)
    k = np.exp(-0.5 * np.einsum("...i,ij,...j->...", g, np.linalg.inv(C), g))
    widths, axes = kernel_principal_widths(k)
    np.testing.assert_allclose(widths, sig, rtol=0.01)
    for i in range(3):  # each axis is a column of R, up to its sign
        assert abs(abs(axes[:, i] @ R[:, i]) - 1) < 1e-3
    # a delta has zero width; an axis-aligned Gaussian gives kernel_sigma
    delta = np.zeros((5, 5, 5))
    delta[2, 2, 2] = 1
    assert np.allclose(kernel_principal_widths(delta)[0], 0)
    k2 = gaussian_kernel((1.0, 0.8, 1.3), 6)
    np.testing.assert_allclose(np.sort(kernel_principal_widths(k2)[0]), np.sort(kernel_sigma(k2)),
                               rtol=1e-6)


def test_richardson_lucy_recovers_a_known_kernel():
    # Richardson (1972) / Lucy (1974): with the exact "image" the iteration
    # converges to the blur kernel; the data are blurred with
    # scipy.ndimage.gaussian_filter (reference library, periodic boundary).
    ic = np.abs(far_field(crystal(32))) ** 2
    blurred = scipy.ndimage.gaussian_filter(ic, 1.0, mode="wrap", truncate=4.0)
    cm = CoherenceModel(ic.shape, CoherenceSettings(half_width=4, rl_iterations=200))
    f = scipy.fft.ifftshift
    cm.update(f(ic).astype(np.float32), f(blurred).astype(np.float32), np.ones(ic.shape, bool))
    np.testing.assert_allclose(cm.sigma, 1.0, rtol=0.1)


# -------------------------------------------------------------------- plan

def test_plan_from_config_round_trip_through_toml():
    text = """
    [[plan]]
    algorithm = "hio"
    iterations = 300
    beta = 0.85
    support_update = "shrinkwrap"
    update_every = 25
    sigma = [3.0, 1.0]
    threshold = 0.12
    [[plan]]
    algorithm = "ER"
    iterations = 50
    sigma = "1.5->1.0"
    average = true
    """
    plan = plan_from_config(tomllib.loads(text)["plan"])
    assert plan[0] == PhasingStage("HIO", 300, 0.85, "shrinkwrap", 25, (3.0, 1.0), 0.12)
    assert plan[1].sigma == (1.5, 1.0) and plan[1].feedback == 0.0 and plan[1].average
    assert plan_from_config(plan_to_config(plan)) == plan
    assert plan_from_config(plan_to_config(default_plan())) == default_plan()


@pytest.mark.parametrize("stage, words", [
    ({"algorithm": "HIO", "iteratons": 10}, ["plan[0]", "iteratons", "did you mean 'iterations'"]),
    ({"algorithm": "HOI"}, ["algorithm", "did you mean 'HIO'"]),
    ({"iterations": 0}, ["iterations", "positive"]),
    ({"beta": 1.5}, ["beta", "(0, 1]"]),
    ({"support_update": "shrinkwarp"}, ["support_update", "did you mean 'shrinkwrap'"]),
    ({"sigma": [3, 2, 1]}, ["sigma"]),
    ({"threshold": 1.2}, ["threshold"]),
    ({"average": "yes"}, ["average", "true or false"]),
])
def test_plan_errors_name_the_key(stage, words):
    with pytest.raises(ConfigError) as exc:
        plan_from_config([stage])
    for w in words:
        assert w in str(exc.value)


def test_options_from_config_rejects_unknown_keys():
    assert options_from_config({"runs": 4, "plan": [{"iterations": 5}]})["plan"][0].iterations == 5
    # every key of the template's [phasing] table is known (fft_effort was not),
    # and its commented plan is the default plan
    import pathlib

    text = (pathlib.Path(__file__).parents[1] / "pipelines" / "template.toml").read_text()
    table = tomllib.loads(text)["phasing"]
    assert options_from_config(table)["fft_effort"] == "FFTW_ESTIMATE"
    start = text.index("# [[phasing.plan]]")
    block = text[start:text.index("# ------", start)]
    plan_text = "\n".join(line[2:] if line.startswith("# ") else line for line in block.splitlines())
    plan = plan_from_config(tomllib.loads(plan_text)["phasing"]["plan"])
    assert [s.to_dict() | {"sigma": None, "threshold": None} for s in plan if s.support_update == "none"] == \
        [s.to_dict() | {"sigma": None, "threshold": None} for s in default_plan() if s.support_update == "none"]
    assert [s for s in plan if s.support_update != "none"] == \
        [s for s in default_plan() if s.support_update != "none"]
    with pytest.raises(ConfigError, match="did you mean 'coherence'"):
        options_from_config({"coherense": True})
    with pytest.raises(ConfigError, match="empty"):
        plan_from_config([])


# --------------------------------------------------------------- bad input

def test_bad_inputs_give_clear_errors():
    good = clean_intensity(32)
    with pytest.raises(InputError, match="all measured voxels are zero"):
        reconstruct(np.zeros((32, 32, 32)), plan=SHORT)
    bad = good.copy()
    bad[3, 4, 5] = np.nan
    with pytest.raises(InputError, match=r"NaN.*\(3, 4, 5\)"):
        reconstruct(bad, plan=SHORT)
    bad = good.copy()
    bad[1, 2, 3] = -4.0
    with pytest.raises(InputError, match=r"negative.*\(1, 2, 3\)"):
        reconstruct(bad, plan=SHORT)
    with pytest.raises(InputError, match=r"mask.*\(32, 32, 32\).*\(32, 32, 30\)"):
        reconstruct(good, np.zeros((32, 32, 30), bool), plan=SHORT)
    big = np.zeros(good.shape, bool)
    big[:, :, :20] = True
    with pytest.raises(InputError, match=r"support.*62\.5%.*at most 50%"):
        reconstruct(good, support=big, plan=SHORT)
    with pytest.raises(InputError, match="3-D"):
        reconstruct(good[0], plan=SHORT)
    with pytest.raises(InputError, match="seed"):
        reconstruct(good, plan=SHORT, seed=-1)
    with pytest.raises(InputError, match="background"):
        reconstruct(good, plan=SHORT, background="auto")
    # a NaN inside the mask is ignored, not an error
    bad = good.copy()
    bad[0, 0, 0] = np.nan
    m = np.zeros(good.shape, bool)
    m[0, 0, 0] = True
    assert reconstruct(bad, m, plan=SHORT, seed=1).ok
    assert issubclass(InputError, BraggStrainError)


def test_undersampled_axis_warns_with_axis_and_ratio():
    # Oversampling sigma = N / L must be >= 2 (common practice; docs/methods.md).
    # A box 20 voxels long on a 32-voxel axis 2 gives sigma = 1.6 there.
    obj = np.zeros((32, 32, 32), np.complex64)
    obj[12:20, 12:20, 6:26] = 1.0
    inten = np.abs(far_field(obj)) ** 2
    ratios = estimate_oversampling(inten)
    assert ratios[2] == pytest.approx(1.6, rel=0.1) and ratios[0] == pytest.approx(4.0, rel=0.1)
    with pytest.warns(OversamplingWarning, match=r"axis 2 is about 1\.[5-7]"):
        reconstruct(inten, plan=SHORT, seed=0, raise_on_failure=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error", OversamplingWarning)
        reconstruct(clean_intensity(32), plan=SHORT, seed=0)  # well sampled: no warning


def test_collapsing_and_exploding_supports_stop_with_a_status():
    inten = clean_intensity(32)
    collapse = [PhasingStage("HIO", 60, 0.9, "shrinkwrap", 10, (0.5, 0.5), 0.98)]
    with pytest.raises(PhasingError, match="collapsed"):
        reconstruct(inten, plan=collapse, seed=0)
    rec = reconstruct(inten, plan=collapse, seed=0, raise_on_failure=False)
    assert rec.status == "support collapsed" and not rec.ok and not rec.obj.any()
    explode = [PhasingStage("HIO", 60, 0.9, "shrinkwrap", 10, (6.0, 6.0), 0.001)]
    with pytest.raises(PhasingError, match="exploded"):
        reconstruct(inten, plan=explode, seed=0)


def test_progress_bar_shows_stage_and_metric(capsys):
    reconstruct(clean_intensity(32), plan=SHORT, seed=0, progress=True)
    err = capsys.readouterr().err
    assert "stage 0 HIO" in err and "err" in err
