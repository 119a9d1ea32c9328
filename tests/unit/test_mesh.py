"""Unit tests of corrpipe.mesh: painting, read-out, windows, FFT helpers, spectra."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate

from corrpipe import mesh
from corrpipe.errors import InputError

L = 100.0


def _oracle_paint(pos, w, n, box, order):
    """Slow, obvious mass assignment (Hockney & Eastwood 1981, ch. 5 kernels)."""
    out = np.zeros((n, n, n))
    h = box / n

    def kernel(d):  # d = distance in cells from node
        d = abs(d)
        if order == 1:
            return 1.0 if d < 0.5 else 0.0
        if order == 2:
            return max(0.0, 1.0 - d)
        if d < 0.5:
            return 0.75 - d * d
        if d < 1.5:
            return 0.5 * (1.5 - d) ** 2
        return 0.0

    for p in range(pos.shape[0]):
        u = (pos[p] / h) % n
        base = np.floor(u).astype(int)
        for di in range(-2, 3):
            for dj in range(-2, 3):
                for dk in range(-2, 3):
                    node = base + np.array([di, dj, dk])
                    wt = (kernel(u[0] - node[0]) * kernel(u[1] - node[1])
                          * kernel(u[2] - node[2]))
                    if wt:
                        out[node[0] % n, node[1] % n, node[2] % n] += w[p] * wt
    return out


@pytest.mark.parametrize("scheme", ["ngp", "cic", "tsc"])
def test_paint_matches_oracle_and_conserves_weight(scheme):
    # Oracle: direct evaluation of the Hockney & Eastwood (1981) kernels, periodic wrap.
    rng = np.random.default_rng(1)
    pos = rng.uniform(-20, 120, size=(60, 3))  # some points outside the cube: must wrap
    w = rng.uniform(0.5, 2.0, size=60)
    got = mesh.paint(pos, L, 8, weights=w, scheme=scheme)
    want = _oracle_paint(pos, w, 8, L, mesh.SCHEMES[scheme])
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)
    assert got.sum() == pytest.approx(w.sum(), rel=1e-12)


@pytest.mark.parametrize("scheme", ["ngp", "cic", "tsc"])
def test_readout_is_adjoint_of_painting(scheme):
    # common practice: interpolation with the same kernel is the transpose of assignment,
    # sum_p w_p f(x_p) = sum_nodes f * paint(w).
    rng = np.random.default_rng(2)
    pos = rng.uniform(0, L, size=(200, 3))
    w = rng.normal(size=200)
    field = rng.normal(size=(16, 16, 16))
    lhs = np.dot(w, mesh.interpolate(field, pos, L, scheme))
    rhs = np.sum(field * mesh.paint(pos, L, 16, weights=w, scheme=scheme))
    assert lhs == pytest.approx(rhs, rel=1e-12)


def test_readout_exact_at_nodes_and_smooth_fields():
    # common practice: NGP/CIC read at a node return the node value; a slowly varying plane
    # wave is reproduced to O((kH)^2) by CIC and TSC.
    n = 32
    x = np.arange(n) * L / n
    k0 = 2 * np.pi / L
    field = np.cos(k0 * x)[:, None, None] * np.ones((1, n, n))
    nodes = np.stack(np.meshgrid(x, x[:3], x[:3], indexing="ij"), -1).reshape(-1, 3)
    for scheme in ("ngp", "cic"):
        np.testing.assert_allclose(mesh.interpolate(field, nodes, L, scheme),
                                   np.cos(k0 * nodes[:, 0]), atol=1e-12)
    pts = np.random.default_rng(3).uniform(0, L, size=(500, 3))
    kh = k0 * L / n
    for scheme in ("cic", "tsc"):
        got = mesh.interpolate(field, pts, L, scheme)
        assert np.max(np.abs(got - np.cos(k0 * pts[:, 0]))) < kh**2


@pytest.mark.parametrize("scheme", ["ngp", "cic", "tsc"])
def test_assignment_window_matches_kernel_transform(scheme):
    # Hockney & Eastwood (1981): averaged over sub-cell offsets x, F_k exp(i k x) of one painted
    # point equals the kernel transform W(k) = sinc(kH/2)^p. Midpoint rule over 400 offsets.
    n = 16
    h = L / n
    offsets = (np.arange(400) + 0.5) / 400 * h
    pos = np.zeros((400, 3))
    pos[:, 0] = 3 * h + offsets
    acc = np.zeros(n // 2 + 1, dtype=complex)
    kx = 2 * np.pi / L * np.arange(n // 2 + 1)
    for p in range(400):
        m = mesh.paint(pos[p:p + 1], L, n, scheme=scheme)
        fk = np.fft.rfft(m.sum(axis=(1, 2)))  # k along x: sum over y, z nodes
        acc += fk * np.exp(1j * kx * pos[p, 0])
    acc /= 400
    window = mesh.assignment_window(n, L, scheme)
    # window along the z (half) axis equals the x-axis one by symmetry
    np.testing.assert_allclose(acc.real, window[0, 0, :], atol=2e-5)
    np.testing.assert_allclose(acc.imag, 0.0, atol=2e-5)


def test_fft_roundtrip_and_float32():
    # common practice: irfftn(rfftn(f)) = f; float32 stays float32.
    rng = np.random.default_rng(4)
    f = rng.normal(size=(16, 16, 16)).astype(np.float32)
    fk = mesh.to_fourier(f)
    assert fk.dtype == np.complex64
    back = mesh.to_real(fk, 16)
    assert back.dtype == np.float32
    np.testing.assert_allclose(back, f, atol=1e-5)


def _plane_wave(n, box, m=(2, 1, 0)):
    x = np.arange(n) * box / n
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    k = 2 * np.pi / box * np.array(m, dtype=float)
    return k, k[0] * X + k[1] * Y + k[2] * Z


def test_gaussian_smoothing_of_plane_wave_and_point():
    # Fourier identity: a plane wave is damped by exp(-k^2 R^2 / 2); a point becomes a
    # normalised 3-D Gaussian of width R (common practice).
    n = 32
    k, phase = _plane_wave(n, L)
    sm = mesh.gaussian_smooth(np.cos(phase), L, 5.0)
    np.testing.assert_allclose(sm, np.exp(-0.5 * k @ k * 25.0) * np.cos(phase), atol=1e-12)

    point = np.zeros((n, n, n))
    point[0, 0, 0] = 1.0
    g = mesh.gaussian_smooth(point, L, 6.0)
    h = L / n
    r2 = (np.arange(5) * h) ** 2
    want = np.exp(-0.5 * r2 / 36.0) / (2 * np.pi * 36.0) ** 1.5 * h**3
    np.testing.assert_allclose(g[:5, 0, 0], want, rtol=1e-6)


def test_gradient_and_displacement_of_plane_wave():
    # Analytic: grad cos(k.x) = -k sin(k.x); Zel'dovich psi for delta = A cos(k.x) is
    # -A k sin(k.x) / k^2 (Zel'dovich 1970: div psi = -delta).
    n = 32
    k, phase = _plane_wave(n, L, (1, 2, 3))
    g = mesh.gradient(np.cos(phase), L)
    for a in range(3):
        np.testing.assert_allclose(g[a], -k[a] * np.sin(phase), atol=1e-10)
    psi = mesh.displacement(0.3 * np.cos(phase), L)
    for a in range(3):
        np.testing.assert_allclose(psi[a], -0.3 * k[a] / (k @ k) * np.sin(phase), atol=1e-10)


def test_displacement_divergence_equals_minus_density():
    # Zel'dovich (1970): div psi = -delta, exact spectrally once the Nyquist planes are removed.
    n = 16
    rng = np.random.default_rng(5)
    fk = np.fft.rfftn(rng.normal(size=(n, n, n)))
    fk[n // 2] = 0
    fk[:, n // 2] = 0
    fk[:, :, n // 2] = 0
    fk[0, 0, 0] = 0
    delta = np.fft.irfftn(fk, s=(n, n, n), axes=(0, 1, 2))
    psi = mesh.displacement(delta, L)
    div = sum(mesh.gradient(psi[a], L)[a] for a in range(3))
    np.testing.assert_allclose(div, -delta, atol=1e-6 * np.abs(delta).max())


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_displacement_component_is_the_plane_wave_answer_and_one_axis_of_the_full_field(dtype):
    # Zel'dovich (1970) psi_k = i k delta_k / k^2; on a plane wave delta = A cos(k.x) it is
    # -A k sin(k.x) / k^2 (analytic). The one-axis routine (what the Zel'dovich mocks use to
    # hold one component at a time) must give that, and exactly one axis of the full field.
    n = 32
    k, phase = _plane_wave(n, L, (1, 2, 3))
    delta_k = mesh.to_fourier((0.3 * np.cos(phase)).astype(dtype))
    full = mesh.displacement_fourier(delta_k, L, stretch=(1.0, 1.0, 1.02))
    for a in range(3):
        one = mesh.displacement_component(delta_k, L, a, stretch=(1.0, 1.0, 1.02))
        assert one.dtype == dtype
        np.testing.assert_array_equal(one, full[a])
        plain = mesh.displacement_component(delta_k, L, a)
        tol = 1e-10 if dtype == np.float64 else 1e-6
        np.testing.assert_allclose(plain, -0.3 * k[a] / (k @ k) * np.sin(phase), atol=tol)


def _fixed_amplitude_field(n, box, power_of_k_mu, los_axis=2, seed=0):
    """Field with |delta_k|^2 exactly V P(k, mu) n^6 / V^2 and random phases."""
    rng = np.random.default_rng(seed)
    wk = np.fft.rfftn(rng.normal(size=(n, n, n)))
    wk /= np.abs(wk)
    kx, ky, kz = mesh.wavenumbers(n, box)
    kk = np.sqrt(kx**2 + ky**2 + kz**2)
    mu = np.where(kk > 0, (kx, ky, kz)[los_axis] / np.where(kk > 0, kk, 1), 0)
    p = power_of_k_mu(kk, mu)
    p[0, 0, 0] = 0.0
    amp = np.sqrt(p * n**6 / box**3)
    return np.fft.irfftn(wk * amp, s=(n, n, n), axes=(0, 1, 2))


def test_power_multipoles_recover_kaiser_factors():
    # Kaiser (1987): P(k, mu) = (1 + beta mu^2)^2 P(k) has multipoles
    # (1 + 2b/3 + b^2/5, 4b/3 + 4b^2/7, 8b^2/35) P; REFERENCES sec. 3 [COMP] values for beta=0.5:
    # 1.3833333, 0.8095238, 0.0571429. Shell averages over the discrete modes of a 64^3 grid:
    # 1% (monopole), 3% (quadrupole), 0.015 absolute (mean hexadecapole over k > 0.3).
    n, box, beta = 64, 300.0, 0.5

    def pk(k, mu):
        return 1e3 * (1 + beta * mu**2) ** 2 * np.ones_like(k)

    delta = _fixed_amplitude_field(n, box, pk)
    edges = np.linspace(0.15, 0.6, 10)
    res = mesh.power_multipoles(delta, box, edges, ells=(0, 2, 4), scheme=None)
    np.testing.assert_allclose(res.power[0] / 1e3, 1.3833333, rtol=0.01)
    np.testing.assert_allclose(res.power[1] / 1e3, 0.8095238, rtol=0.03)
    # single hexadecapole shells scatter by ~0.02 from the discrete mu sampling; test their mean
    assert np.mean(res.power[2][res.k > 0.3]) / 1e3 == pytest.approx(0.0571429, abs=0.01)
    assert np.all(res.n_modes > 100)


def test_correlation_multipoles_match_hamilton_for_gaussian_spectrum():
    # P(k) = A exp(-k^2 R^2) has xi(r) = A exp(-r^2 / 4R^2) / (8 pi^1.5 R^3) (Gaussian integral);
    # with the Kaiser factor the redshift-space xi(r, mu) = sum_l xi_l(r) L_l(mu) with Hamilton's
    # (1992) xi_0, xi_2, xi_4 (REFERENCES sec. 3). The theory is evaluated at every mesh lag and
    # averaged like the measurement, so only the FFT estimate is under test. Fixed-amplitude
    # field on 64^3 of 256 Mpc/h; tolerance 2% of the largest |xi| in range.
    n, box, R, A, beta = 64, 256.0, 8.0, 1e4, 0.4

    def pk(k, mu):
        return A * (1 + beta * mu**2) ** 2 * np.exp(-(k * R) ** 2)

    delta = _fixed_amplitude_field(n, box, pk, seed=7)
    edges = np.arange(20.0, 52.0, 4.0)
    s, xi = mesh.correlation_multipoles(delta, box, edges, ells=(0, 2, 4))

    def xi_real(r):
        return A * np.exp(-r**2 / (4 * R**2)) / (8 * np.pi**1.5 * R**3)

    r_grid = np.linspace(1e-3, 80, 4001)
    bar1 = np.array([integrate.quad(lambda x: xi_real(x) * x**2, 0, r)[0] for r in r_grid])
    bar2 = np.array([integrate.quad(lambda x: xi_real(x) * x**4, 0, r)[0] for r in r_grid])
    xibar = 3 * bar1 / r_grid**3
    xibarbar = 5 * bar2 / r_grid**5
    x0 = (1 + 2 * beta / 3 + beta**2 / 5) * xi_real(r_grid)
    x2 = (4 * beta / 3 + 4 * beta**2 / 7) * (xi_real(r_grid) - xibar)
    x4 = 8 * beta**2 / 35 * (xi_real(r_grid) + 2.5 * xibar - 3.5 * xibarbar)

    lag = np.fft.fftfreq(n, d=1.0 / n) * box / n
    rx, ry, rz = np.meshgrid(lag, lag, lag, indexing="ij")
    r = np.sqrt(rx**2 + ry**2 + rz**2)
    sel = (r >= edges[0]) & (r < edges[-1])
    r, mu = r[sel], rz[sel] / r[sel]
    leg2 = 0.5 * (3 * mu**2 - 1)
    leg4 = (35 * mu**4 - 30 * mu**2 + 3) / 8
    model = (np.interp(r, r_grid, x0) + np.interp(r, r_grid, x2) * leg2
             + np.interp(r, r_grid, x4) * leg4)
    idx = np.digitize(r, edges) - 1
    cnt = np.bincount(idx)
    scale = np.abs(xi[0]).max()
    for i, leg in enumerate((1.0, leg2, leg4)):
        want = (4 * i + 1) * np.bincount(idx, weights=model * leg) / cnt
        np.testing.assert_allclose(xi[i], want, atol=0.02 * scale)
    # and the shell-projected quadrupole is close to Hamilton's at the bin centres
    np.testing.assert_allclose(xi[1], np.interp(s, r_grid, x2), atol=0.05 * scale)


def test_bad_input_errors():
    # common practice: clear errors, not numpy tracebacks
    with pytest.raises(InputError, match="shape"):
        mesh.paint(np.zeros((5, 2)), L, 8)
    with pytest.raises(InputError, match="scheme"):
        mesh.paint(np.zeros((5, 3)), L, 8, scheme="pcs")
    with pytest.raises(InputError, match="box_size"):
        mesh.paint(np.zeros((5, 3)), -1.0, 8)
    with pytest.raises(InputError, match="NaN"):
        mesh.paint(np.full((5, 3), np.nan), L, 8)
    with pytest.raises(InputError, match="empty"):
        mesh.density_contrast(np.zeros((4, 4, 4)))


@pytest.mark.parametrize("scheme", ["ngp", "cic", "tsc"])
def test_shot_noise_window_removes_poisson_noise(scheme):
    # Jing (2005) eq. 20 [from memory]: the painted power of Poisson points is
    # (1/nbar) sum_n W^2(k + 2 k_N n); after subtracting it the power of uniform random points
    # is zero within its noise ~ (1/nbar) / sqrt(n_modes / 2) per bin, up to the Nyquist shell.
    rng = np.random.default_rng(11)
    box, n, n_pts = 200.0, 32, 200_000
    pos = rng.uniform(0, box, size=(n_pts, 3))
    delta = mesh.density_contrast(mesh.paint(pos, box, n, scheme=scheme))
    edges = np.linspace(0.05, np.pi * n / box, 8)
    res = mesh.power_multipoles(delta, box, edges, ells=(0,), scheme=scheme,
                                shot_noise=box**3 / n_pts)
    noise = box**3 / n_pts
    assert np.all(np.abs(res.power[0]) < 4 * noise / np.sqrt(res.n_modes / 2) + 0.01 * noise)
    # without the alias sum the error near Nyquist is far larger (CIC/TSC)
    if scheme != "ngp":
        naive = mesh.power_multipoles(delta, box, edges, ells=(0,), scheme=scheme)
        assert np.abs(naive.power[0][-1] - noise) > 0.05 * noise
