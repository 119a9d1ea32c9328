"""Unit tests of corrpipe.recon: solvers against analytic displacements, shifts, errors, I/O."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import h5py
import numpy as np
import pytest

from corrpipe import mesh, recon
from corrpipe.config import validate_section
from corrpipe.errors import ConfigError, InputError

L = 200.0
N = 32


def _settings(**kw) -> recon.ReconSettings:
    base = dict(enabled=True, n_mesh=N, smoothing=10.0)
    base.update(kw)
    return recon.ReconSettings(**base)


def _node_grid(n: int, box: float, origin=(0.0, 0.0, 0.0)):
    x = np.arange(n) * box / n
    return np.meshgrid(x + origin[0], x + origin[1], x + origin[2], indexing="ij")


def _smooth_random_field(n: int, box: float, seed: int, radius: float) -> np.ndarray:
    rng = np.random.default_rng(seed)
    white = rng.normal(size=(n, n, n))
    field = mesh.gaussian_smooth(white, box, radius)
    field -= field.mean()            # a periodic displacement cannot source the k = 0 mode
    return field / field.std() * 0.1


# ------------------------------------------------------------------ box solver, single mode


@pytest.mark.parametrize("beta, los", [(0.0, None), (0.0, 2), (0.4, 2), (0.7, 0)])
def test_box_solver_exact_for_a_single_fourier_mode(beta, los):
    # Analytic: delta = A cos(k.x) -> psi = -A k sin(k.x) / [b k^2 (1 + beta mu^2)],
    # the plane-wave solution of div psi + beta d_los psi_los = -delta / b
    # (Padmanabhan et al. 2012, MNRAS 427, 2132, sec. 3 [from memory]).
    bias, amp = 1.7, 0.3
    kvec = 2 * np.pi / L * np.array([2.0, -1.0, 3.0])
    x, y, z = _node_grid(N, L)
    phase = kvec[0] * x + kvec[1] * y + kvec[2] * z
    delta = amp * np.cos(phase)
    theta_k = recon.box_displacement(mesh.to_fourier(delta), L, bias=bias, beta=beta,
                                     los_axis=los)
    psi = mesh.displacement_fourier(theta_k, L)
    k2 = kvec @ kvec
    mu2 = 0.0 if los is None else kvec[los] ** 2 / k2
    for a in range(3):
        want = -amp * kvec[a] * np.sin(phase) / (bias * k2 * (1 + beta * mu2))
        np.testing.assert_allclose(psi[a], want, atol=1e-12 * amp / np.sqrt(k2))


def test_box_solver_matches_mesh_displacement_without_rsd():
    # Zel'dovich 1970: with beta = 0 and b = 1 the solver must equal mesh.displacement
    # (div psi = -delta), an independent implementation in corrpipe.mesh.
    delta = _smooth_random_field(N, L, 3, 8.0)
    want = mesh.displacement(delta, L)
    got = mesh.displacement_fourier(
        recon.box_displacement(mesh.to_fourier(delta), L, bias=1.0, beta=0.0, los_axis=2), L)
    np.testing.assert_allclose(got, want, atol=1e-12)


# ------------------------------------------------------------------ survey solver


def _survey_geometry(distance: float) -> recon.MeshGeometry:
    # mesh centred at distance along z from the observer at the origin
    return recon.MeshGeometry(origin=(-L / 2, -L / 2, distance - L / 2), box_size=L, n_mesh=N,
                              periodic=False)


def test_survey_solver_reduces_to_plane_parallel_far_from_observer():
    # Padmanabhan et al. 2012 [from memory]: far from the observer r_hat -> z and the radial
    # equation becomes the plane-parallel one, solved exactly by box_displacement. The
    # difference is set by the opening angle (~L / D = 2e-4 here).
    beta, bias = 0.45, 2.0
    geometry = _survey_geometry(1.0e6)
    delta = _smooth_random_field(N, L, 5, 12.0)
    delta_k = mesh.to_fourier(delta)
    theta, iters, history = recon.survey_displacement(delta_k, geometry, bias=bias, beta=beta,
                                                      tolerance=1e-6)
    exact = recon.box_displacement(delta_k, L, bias=bias, beta=beta, los_axis=2)
    psi = mesh.displacement_fourier(theta, L)
    psi_exact = mesh.displacement_fourier(exact, L)
    scale = np.abs(psi_exact).max()
    assert np.abs(psi - psi_exact).max() < 2e-3 * scale
    # the residual at the plane-parallel start is already tiny: the radial operator is right
    assert history[0] < 2e-3
    assert history[-1] < 1e-6


def test_survey_solver_converges_and_satisfies_the_equation_near_the_observer():
    # Padmanabhan et al. 2012 equation with a radial line of sight; iteration after Burden,
    # Percival & Howlett 2015 [from memory] with Richardson relaxation w = 2/(2+beta), whose
    # plane-parallel contraction factor is beta/(2+beta) (Saad 2003, ch. 4 [from memory]).
    # Independent oracle: the equation evaluated with central finite differences
    # (numpy.gradient) instead of the solver's spectral derivatives.
    beta, bias = 0.5, 1.5
    geometry = _survey_geometry(1.5 * L)       # wide opening angle: the radial term matters
    delta = _smooth_random_field(N, L, 7, 20.0)
    delta_k = mesh.to_fourier(delta)
    theta, iters, history = recon.survey_displacement(delta_k, geometry, bias=bias, beta=beta,
                                                      max_iterations=30, tolerance=1e-5)
    assert history[-1] < 1e-5
    assert len(history) == iters + 1
    assert 2 <= iters <= 15
    # geometric convergence at about the predicted factor (allow 2x for the radial geometry)
    rates = np.array(history[1:]) / np.array(history[:-1])
    assert np.median(rates) < 2 * beta / (2 + beta)
    psi = mesh.displacement_fourier(theta, L)
    start = recon.box_displacement(delta_k, L, bias=bias, beta=beta, los_axis=2)
    psi_start = mesh.displacement_fourier(start, L)
    fd_solution = recon.equation_residual(psi, delta, geometry, bias=bias, beta=beta)
    fd_start = recon.equation_residual(psi_start, delta, geometry, bias=bias, beta=beta)
    # finite differences of a field smoothed on 20 Mpc/h with 6.25 Mpc/h cells: truncation
    # error ~ (k h)^2 / 6 ~ 2 %; the plane-parallel guess is off by much more
    assert fd_solution < 0.05
    assert fd_start > 3 * fd_solution


def test_survey_solver_without_rsd_is_the_zeldovich_solution():
    # Zel'dovich 1970: beta = 0 leaves div psi = -delta / b; no iterations are needed.
    delta = _smooth_random_field(N, L, 9, 10.0)
    theta, iters, history = recon.survey_displacement(mesh.to_fourier(delta),
                                                      _survey_geometry(300.0), bias=2.0,
                                                      beta=0.0)
    assert iters == 0
    np.testing.assert_allclose(mesh.displacement_fourier(theta, L),
                               mesh.displacement(delta, L) / 2.0, atol=1e-12)


# ------------------------------------------------------------------ particles


def _lattice(n_side: int, box: float) -> np.ndarray:
    q = (np.arange(n_side) + 0.5) * box / n_side
    return np.stack(np.meshgrid(q, q, q, indexing="ij"), -1).reshape(-1, 3)


@pytest.mark.parametrize("growth_rate", [0.0, 0.8])
def test_box_reconstruction_undoes_a_single_mode_zeldovich_displacement(growth_rate):
    # Zel'dovich 1970: x = q + psi(q), s = x + f psi_z z (Kaiser 1987); to first order the
    # reconstruction returns psi times the Gaussian filter exp(-k^2 R^2/2) and two CIC
    # windows (painting and read-out; Hockney & Eastwood 1981), so the shifted data sit at
    # q + (1 - S W^2) (psi + f psi_z z). Second-order terms ~ k eps ~ 0.5 % of eps here.
    box, n, bias, eps, radius = 256.0, 64, 1.0, 0.2, 4.0
    kvec = 2 * np.pi / box * np.array([1.0, 0.0, 1.0])
    khat = kvec / np.linalg.norm(kvec)
    q = _lattice(n, box)
    psi_true = eps * khat[None, :] * np.sin(q @ kvec)[:, None]
    x = q + psi_true
    x[:, 2] += growth_rate * psi_true[:, 2]
    settings = _settings(n_mesh=n, smoothing=radius, random_ratio=0.1)
    res = recon.reconstruct_box(x, None, box, los_axis=2, growth_rate=growth_rate, bias=bias,
                                settings=settings, seed=11)
    kk = kvec @ kvec
    h = box / n
    window = np.prod(np.sinc(kvec * h / (2 * np.pi)) ** 2) ** 2
    gain = np.exp(-0.5 * kk * radius**2) * window
    np.testing.assert_allclose(res.data_displacement, gain * psi_true, atol=0.01 * eps)
    back = (res.data_positions - q + box / 2) % box - box / 2
    expected_left = (1 - gain) * psi_true
    expected_left[:, 2] *= 1 + growth_rate
    np.testing.assert_allclose(back, expected_left, atol=0.01 * eps * (1 + growth_rate))
    assert res.iterations == 0 and res.los_axis == 2
    assert res.random_positions.shape == (int(round(0.1 * n**3)), 3)
    assert np.all((res.data_positions >= 0) & (res.data_positions < box))


def test_random_conventions_differ_by_the_rsd_term():
    # Padmanabhan et al. 2012 [from memory] (REFERENCES.md sec. 8): "remove-rsd" moves randoms
    # by -psi; "keep-rsd" by -[psi + f psi_z z]. Same seed -> same unshifted randoms.
    rng = np.random.default_rng(4)
    pos = rng.uniform(0, L, size=(4000, 3))
    f = 0.7
    out = {}
    for conv in recon.CONVENTIONS:
        out[conv] = recon.reconstruct_box(pos, None, L, los_axis=1, growth_rate=f, bias=2.0,
                                          settings=_settings(convention=conv), seed=5)
    rand = np.random.default_rng(5).uniform(0, L, size=out["keep-rsd"].random_positions.shape)

    def shift(p):
        return (p - rand + L / 2) % L - L / 2

    s_remove = shift(out["remove-rsd"].random_positions)
    s_keep = shift(out["keep-rsd"].random_positions)
    np.testing.assert_allclose(s_keep[:, [0, 2]], s_remove[:, [0, 2]], atol=1e-10)
    np.testing.assert_allclose(s_keep[:, 1], (1 + f) * s_remove[:, 1], atol=1e-10)
    # data are shifted identically in both conventions
    np.testing.assert_array_equal(out["keep-rsd"].data_positions,
                                  out["remove-rsd"].data_positions)
    assert np.abs(s_remove).max() > 0.1          # the test is not vacuous


def test_box_same_seed_same_result_and_real_space_box_ignores_f():
    # common practice: explicit seeds give identical output.
    rng = np.random.default_rng(8)
    pos = rng.uniform(0, L, size=(3000, 3))
    a = recon.reconstruct_box(pos, None, L, los_axis=None, growth_rate=0.8, bias=2.0,
                              settings=_settings(), seed=3)
    b = recon.reconstruct_box(pos, None, L, los_axis=None, growth_rate=0.0, bias=2.0,
                              settings=_settings(), seed=3)
    np.testing.assert_array_equal(a.random_positions, b.random_positions)
    np.testing.assert_array_equal(a.data_positions, b.data_positions)
    assert a.growth_rate == 0.0 and a.random_seed == 3


def _uniform_sphere_shell(rng, n, r_lo, r_hi, centre_dir):
    out = []
    while sum(len(o) for o in out) < n:
        p = rng.uniform(-r_hi, r_hi, size=(4 * n, 3))
        r = np.linalg.norm(p, axis=1)
        keep = (r > r_lo) & (r < r_hi) & (p @ centre_dir > 0.8 * r)
        out.append(p[keep])
    return np.concatenate(out)[:n]


def test_survey_density_contrast_is_zero_when_data_trace_the_randoms():
    # common practice (Padmanabhan et al. 2012 sec. 3 [from memory]): delta = rho_d/(alpha
    # rho_r) - 1 vanishes when the data are the randoms (any constant weight), and cells
    # outside the footprint (below the density threshold) are set to zero.
    rng = np.random.default_rng(2)
    rand = _uniform_sphere_shell(rng, 20000, 300, 500, np.array([0.0, 0.0, 1.0]))
    settings = _settings(n_mesh=48, smoothing=15.0, padding=60.0)
    geometry = recon.survey_geometry(rand, rand, settings)
    delta = recon.survey_density_contrast(rand, np.full(len(rand), 3.0), rand,
                                          np.ones(len(rand)), geometry, smoothing=15.0)
    assert np.abs(delta).max() < 1e-10
    # geometry: cube centred on the points, side = extent + 2 padding
    span = (rand.max(0) - rand.min(0)).max()
    assert geometry.box_size == pytest.approx(span + 120.0)
    np.testing.assert_allclose(np.asarray(geometry.origin) + geometry.box_size / 2,
                               0.5 * (rand.max(0) + rand.min(0)))


def test_survey_reconstruction_runs_and_moves_by_psi():
    # Padmanabhan et al. 2012 (REFERENCES.md sec. 8): galaxies move by -[psi + f (psi.r)r],
    # randoms by -psi ("remove-rsd"); the stored psi at the data reproduces the data shift.
    rng = np.random.default_rng(3)
    dirn = np.array([0.0, 0.6, 0.8])
    rand = _uniform_sphere_shell(rng, 30000, 300, 500, dirn)
    data = _uniform_sphere_shell(rng, 6000, 300, 500, dirn)
    f = 0.75
    settings = _settings(n_mesh=48, smoothing=15.0, padding=60.0, tolerance=1e-4)
    res = recon.reconstruct_survey(data, None, rand, None, growth_rate=f, bias=2.0,
                                   settings=settings)
    assert res.residual < 1e-4 and res.iterations >= 1
    rhat = data / np.linalg.norm(data, axis=1)[:, None]
    psi = res.data_displacement
    want = data - psi - f * np.sum(psi * rhat, axis=1)[:, None] * rhat
    np.testing.assert_allclose(res.data_positions, want, atol=1e-9)
    assert res.random_positions.shape == rand.shape
    rms = np.sqrt(np.mean(np.sum(psi**2, axis=1)))
    assert 0.1 < rms < 20.0        # Poisson noise of 6000 points smoothed on 15 Mpc/h


# ------------------------------------------------------------------ bad input


def test_survey_without_randoms_is_a_clear_error():
    # common practice: randoms define the footprint; a survey cannot be reconstructed without.
    data = np.random.default_rng(0).uniform(100, 300, size=(100, 3))
    for rand in (None, np.empty((0, 3))):
        with pytest.raises(InputError, match="needs randoms"):
            recon.reconstruct_survey(data, None, rand, None, growth_rate=0.7, bias=2.0,
                                     settings=_settings())


def test_mesh_too_small_for_the_survey_is_a_clear_error():
    # common practice: the mesh must enclose every object.
    rng = np.random.default_rng(1)
    data = rng.uniform(100, 500, size=(500, 3))
    with pytest.raises(InputError, match="too small for the survey.*box_size >="):
        recon.reconstruct_survey(data, None, data, None, growth_rate=0.7, bias=2.0,
                                 settings=_settings(box_size=300.0))


def test_smoothing_below_cell_size_is_a_clear_error():
    # common practice: the mesh must resolve the smoothing kernel (cell <= R).
    rng = np.random.default_rng(1)
    data = rng.uniform(100, 2100, size=(500, 3))   # 2000 + 200 Mpc/h over 32 cells: 69 Mpc/h
    with pytest.raises(InputError, match="below the mesh cell size.*n_mesh >= 147"):
        recon.reconstruct_survey(data, None, data, None, growth_rate=0.7, bias=2.0,
                                 settings=_settings(smoothing=15.0))
    with pytest.raises(InputError, match="below the mesh cell size"):
        recon.reconstruct_box(data - 100, None, 2000.0, los_axis=2, growth_rate=0.7, bias=2.0,
                              settings=_settings(smoothing=15.0), seed=1)


def test_bad_arrays_are_clear_errors():
    # common practice: say what is wrong and where.
    rng = np.random.default_rng(1)
    data = rng.uniform(100, 300, size=(200, 3))
    bad = data.copy()
    bad[7, 1] = np.nan
    with pytest.raises(InputError, match=r"data positions: 1 of 200 rows.*row 7"):
        recon.reconstruct_survey(bad, None, data, None, growth_rate=0.7, bias=2.0,
                                 settings=_settings())
    with pytest.raises(InputError, match=r"random weights must have shape \(200,\)"):
        recon.reconstruct_survey(data, None, data, np.ones(5), growth_rate=0.7, bias=2.0,
                                 settings=_settings())
    with pytest.raises(InputError, match="bias must be a positive"):
        recon.reconstruct_survey(data, None, data, None, growth_rate=0.7, bias=0.0,
                                 settings=_settings())
    with pytest.raises(InputError, match=r"shape \(N, 3\)"):
        recon.reconstruct_box(data[:, :2], None, L, los_axis=2, growth_rate=0.7, bias=2.0,
                              settings=_settings(), seed=1)


def test_settings_validation_through_the_config_loader(tmp_path: Path):
    # common practice: one of n_mesh / cell_size; smoothing must exceed the cell.
    ok = validate_section(recon.ReconSettings, {"enabled": True, "cell_size": 5.0},
                          "reconstruct", "test.toml", tmp_path)
    assert ok.smoothing == 15.0 and ok.convention == "remove-rsd" and ok.growth_rate is None
    with pytest.raises(ConfigError, match="n_mesh or cell_size, not both"):
        validate_section(recon.ReconSettings, {"n_mesh": 128, "cell_size": 5.0},
                         "reconstruct", "test.toml", tmp_path)
    with pytest.raises(ConfigError, match="smoothing = 4.0 Mpc/h is below cell_size"):
        validate_section(recon.ReconSettings, {"smoothing": 4.0, "cell_size": 5.0},
                         "reconstruct", "test.toml", tmp_path)
    with pytest.raises(ConfigError, match="convention"):
        validate_section(recon.ReconSettings, {"convention": "sym"}, "reconstruct",
                         "test.toml", tmp_path)


def test_growth_rate_from_the_cosmology_by_default():
    # Cosmology.growth_rate is the fiducial f (astropy background); the configured value wins.
    from corrpipe.cosmology import preset
    cosmo = preset("planck2018")
    s = recon.ReconSettings()
    assert recon.resolve_growth_rate(s, cosmo, 0.5) == pytest.approx(
        float(cosmo.growth_rate(0.5)))
    # Omega_m(z)^0.55 (Linder 2005, Astropart. Phys. 28, 481 [from memory]) within 1 %
    om = cosmo.omega_m * 1.5**3 / (cosmo.omega_m * 1.5**3 + 1 - cosmo.omega_m)
    assert recon.resolve_growth_rate(s, cosmo, 0.5) == pytest.approx(om**0.55, rel=0.01)
    assert recon.resolve_growth_rate(dataclasses.replace(s, growth_rate=0.6), cosmo, 0.5) == 0.6


def test_result_round_trips_through_hdf5(tmp_path: Path):
    # common practice: the checkpoint stores everything needed to rebuild the result.
    rng = np.random.default_rng(6)
    pos = rng.uniform(0, L, size=(2000, 3))
    res = recon.reconstruct_box(pos, rng.uniform(0.5, 1.5, 2000), L, los_axis=2,
                                growth_rate=0.6, bias=2.0, settings=_settings(), seed=9)
    with h5py.File(tmp_path / "r.h5", "w") as h5:
        res.to_hdf5(h5.create_group("reconstruct"))
    with h5py.File(tmp_path / "r.h5", "r") as h5:
        back = recon.ReconResult.from_hdf5(h5["reconstruct"])
    for name in recon.ReconResult._ARRAYS:
        np.testing.assert_array_equal(getattr(back, name), getattr(res, name))
    assert back.geometry == res.geometry and back.los_axis == 2 and back.random_seed == 9
    assert back.growth_rate == 0.6 and back.convention == res.convention


def test_memory_estimate_of_a_512_mesh():
    # arithmetic: a 512^3 float64 mesh is 2^30 bytes (half-space complex the same).
    assert recon.memory_estimate(512, "double") == 8 * 512 * 512 * 257 * 16
    assert recon.memory_estimate(512, "single") < 5 * 2**30


@pytest.mark.parametrize("scheme", ["ngp", "cic", "tsc"])
def test_vector_read_out_kernel_matches_mesh_interpolate(scheme):
    # Oracle: corrpipe.mesh.interpolate, one component at a time (same Hockney & Eastwood
    # 1981 kernels), on a mesh with an offset origin and points that wrap around.
    rng = np.random.default_rng(12)
    field = rng.normal(size=(16, 16, 16))
    geometry = recon.MeshGeometry(origin=(-50.0, 10.0, 300.0), box_size=80.0, n_mesh=16,
                                  periodic=False)
    pos = rng.uniform(-60, 40, size=(5000, 3)) + np.array([0.0, 60.0, 340.0])
    theta_k = mesh.to_fourier(field)
    psi = mesh.displacement_fourier(theta_k, 80.0)
    got = recon.solver._displacement_at(theta_k, geometry, [pos], scheme, None)[0]
    want = np.stack([mesh.interpolate(psi[a], pos, 80.0, scheme, np.array(geometry.origin))
                     for a in range(3)], axis=1)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)


def test_single_precision_meshes_agree_with_double():
    # common practice: float32 meshes change the displacement only at the ~1e-6 relative
    # level of single-precision FFTs (plus the iteration tolerance).
    rng = np.random.default_rng(13)
    dirn = np.array([0.6, 0.0, 0.8])
    rand = _uniform_sphere_shell(rng, 20000, 300, 500, dirn)
    data = _uniform_sphere_shell(rng, 5000, 300, 500, dirn)
    out = {}
    for precision in ("double", "single"):
        settings = _settings(n_mesh=48, smoothing=15.0, padding=60.0, tolerance=1e-5,
                             precision=precision)
        out[precision] = recon.reconstruct_survey(data, None, rand, None, growth_rate=0.7,
                                                  bias=2.0, settings=settings)
    d, s = out["double"].data_displacement, out["single"].data_displacement
    assert np.abs(d - s).max() < 1e-4 * np.abs(d).max()
