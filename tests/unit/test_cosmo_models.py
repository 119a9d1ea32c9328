"""Expansion-history distances, the r_d fitting formula and the figure of merit.

References: astropy.cosmology (FlatLambdaCDM, FlatwCDM, Flatw0waCDM, LambdaCDM, wCDM,
w0waCDM) as the reference library for D_M and D_H; Aubourg et al. 2015, eq. 16 and its check
value in REFERENCES §14 [from memory]; Albrecht et al. 2006 (DETF figure of merit) [from
memory].
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy import cosmology as ac

from corrpipe.cosmo.fisher import figure_of_merit
from corrpipe.cosmo.models import ExpansionModel
from corrpipe.cosmo.priors import r_d_fitting_formula
from corrpipe.errors import InputError

Z = np.concatenate([np.geomspace(1e-3, 0.1, 8), np.linspace(0.15, 5.0, 40)])
C_KM_S = 299792.458
NU = dict(Tcmb0=2.7255, Neff=3.044, m_nu=[0.0, 0.0, 0.06])
H = 0.68
OM = 0.31


def _reference(kind: str, ok: float, de: dict):
    """The astropy class of each model, built independently of corrpipe's own helper."""
    common = dict(H0=100 * H, Om0=OM, **NU)
    flat = ac.FlatLambdaCDM(**common)
    ode = 1.0 - OM - ok - float(flat.Ogamma0 + flat.Onu0)
    if kind == "flat-lcdm":
        return flat if ok == 0 else ac.LambdaCDM(Ode0=ode, **common)
    if kind == "wcdm":
        return (ac.FlatwCDM(w0=de["w"], **common) if ok == 0
                else ac.wCDM(Ode0=ode, w0=de["w"], **common))
    return (ac.Flatw0waCDM(w0=de["w0"], wa=de["wa"], **common) if ok == 0
            else ac.w0waCDM(Ode0=ode, w0=de["w0"], wa=de["wa"], **common))


@pytest.mark.parametrize("kind,de", [("flat-lcdm", {}), ("wcdm", {"w": -0.8}),
                                     ("w0wacdm", {"w0": -0.7, "wa": -1.2}),
                                     ("w0wacdm", {"w0": -1.3, "wa": 0.8})])
@pytest.mark.parametrize("ok", [0.0, 0.15, -0.15])
def test_distances_match_astropy_to_1e6(kind, de, ok):
    ref = _reference(kind, ok, de)
    assert ref.Ok0 == pytest.approx(ok, abs=1e-12)
    grid = ExpansionModel(kind, curvature=ok != 0.0).grid(Z)
    got = grid.distances(dict(Omega_m=OM, h=H, Omega_k=ok, **de))
    dm = ref.comoving_transverse_distance(Z).value
    dh = C_KM_S / ref.H(Z).value
    dv = np.cbrt(Z * dm**2 * dh)  # Eisenstein et al. 2005 definition (REFERENCES §7)
    for name, want in (("DM", dm), ("DH", dh), ("DV", dv)):
        assert np.max(np.abs(got[name] / want - 1)) < 1e-6, name


def test_no_radiation_matches_astropy():
    ref = ac.Flatw0waCDM(H0=100 * H, Om0=OM, w0=-0.9, wa=0.3, Tcmb0=0.0)
    grid = ExpansionModel("w0wacdm", T_cmb=0.0).grid(Z)
    got = grid.distances(dict(Omega_m=OM, h=H, w0=-0.9, wa=0.3))
    assert np.max(np.abs(got["DM"] / ref.comoving_distance(Z).value - 1)) < 1e-6


def test_over_rd_scales_with_h_rd_only():
    grid = ExpansionModel("flat-lcdm").grid([0.5, 1.0])
    a = grid.over_rd(dict(Omega_m=OM, h=H, h_rd=100.0))
    b = grid.over_rd(dict(Omega_m=OM, h=H, h_rd=50.0))
    assert np.allclose(b["DM_over_rd"], 2 * a["DM_over_rd"], rtol=1e-14)
    d = grid.distances(dict(Omega_m=OM, h=H))
    r_d = 100.0 / H
    assert np.allclose(a["DH_over_rd"], d["DH"] / r_d, rtol=1e-13)


@pytest.mark.parametrize("z", [0.0, -0.1, 5.5, np.nan])
def test_redshift_outside_the_model_range_is_a_one_line_error(z):
    with pytest.raises(InputError, match="outside the range of the expansion models") as exc:
        ExpansionModel("wcdm").grid([0.5, z])
    assert "\n" not in str(exc.value)


def test_unknown_model_is_a_one_line_error():
    with pytest.raises(InputError, match="unknown; choose one of flat-lcdm, wcdm, w0wacdm"):
        ExpansionModel("lcdm-plus")


def test_r_d_fitting_formula_check_value():
    # REFERENCES §14 [COMP]: omega_cb = 0.1424, omega_b = 0.02242, omega_nu = 0.00064 -> 147.0
    # Mpc (quoted to 0.1 Mpc); Planck 2018 r_drag = 147.09 +- 0.26 Mpc (Planck 2020, Table 2).
    r_d = float(r_d_fitting_formula(0.1424, 0.02242, 0.00064))
    assert r_d == pytest.approx(147.0, abs=0.06)
    assert abs(r_d - 147.09) < 0.26


def test_figure_of_merit_is_inverse_sqrt_determinant():
    # Albrecht et al. 2006 [from memory]: FoM = 1/sqrt(det C); sigma 0.1, 0.5, r = 0.6
    cov = np.array([[0.01, 0.6 * 0.05], [0.6 * 0.05, 0.25]])
    assert figure_of_merit(cov) == pytest.approx(1.0 / (0.1 * 0.5 * np.sqrt(1 - 0.36)))


@pytest.mark.parametrize("kind,curvature,prior", [
    ("w0wacdm", False, {}), ("wcdm", True, {"r_d_prior": (147.0, 1.0)}),
    ("flat-lcdm", False, {"omega_b_prior": (0.0222, 0.0005)})])
def test_vectorised_posterior_equals_the_pointwise_one(kind, curvature, prior):
    # The batch path emcee uses must equal the pointwise path (itself held to astropy above).
    from corrpipe.cosmo import (DataVector, DistanceLikelihood, Measurement, ParameterSpace,
                                SampleDensity)

    z = [0.4, 0.8, 1.4]
    ms = tuple(Measurement(f"b{i}", zz, q, v) for i, zz in enumerate(z)
               for q, v in (("DM_over_rd", 10.0 + 8 * zz), ("DH_over_rd", 24.0 - 7 * zz)))
    cov = np.diag([0.2, 0.5] * 3) ** 2
    space = ParameterSpace(ExpansionModel(kind, curvature=curvature), **prior)
    rng = np.random.default_rng(4)
    dens = {"b1": SampleDensity(rng.multivariate_normal([16.4, 18.4], cov[2:4, 2:4], 2000))}
    for densities in ({}, dens):
        like = DistanceLikelihood(space, DataVector(ms, cov, ("x",) * 6), densities)
        thetas = space.low + (space.high - space.low) * rng.uniform(0.2, 0.8, (40, space.n_dim))
        thetas[0, 0] = -1.0  # outside the flat prior
        many = like.log_posterior_many(thetas)
        one = np.array([like.log_posterior(t) for t in thetas])
        assert np.array_equal(np.isfinite(many), np.isfinite(one))
        fin = np.isfinite(one)
        assert np.allclose(many[fin], one[fin], rtol=1e-12, atol=1e-9)
