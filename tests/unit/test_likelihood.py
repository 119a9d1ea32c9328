"""Likelihood: noise-free recovery, broadband marginalisation, alpha-epsilon mapping, errors."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from corrpipe.cosmology import Cosmology
from corrpipe.errors import ConfigError, InputError
from corrpipe.fit.likelihood import Likelihood
from corrpipe.fit.result import dilations_from_samples
from corrpipe.fit.run import best_fit
from corrpipe.fit.settings import FitSettings
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate

S = np.arange(42.5, 160.0, 5.0)
_CACHE = {}


def _template() -> BAOTemplate:
    if "t" not in _CACHE:
        _CACHE["t"] = BAOTemplate(LinearPower.eisenstein_hu(Cosmology(), 0.5))
    return _CACHE["t"]


def _data(a_par, a_perp, ells=(0, 2)):
    tpl = _template()
    m = tpl.multipoles(S, a_par, a_perp, ells, B=1.3, beta=0.4, sigma_par=10.0, sigma_perp=6.0,
                       sigma_s=4.0)
    # add a broadband inside the marginalised family (a0 + a1/s + a2/s^2 per multipole)
    m = m + np.array([[2e-4 + 0.05 / S + 1.0 / S**2], [-1e-4 - 0.03 / S + 0.5 / S**2]][
        :len(ells)]).reshape(len(ells), -1)
    err = np.tile(1e-3 * 100.0 / S, len(ells))
    return m.ravel(), np.diag(err**2)


def test_noise_free_recovery_anisotropic():
    # Brief "done when": template at alpha_par = 1.04, alpha_perp = 0.97 fitted with the same
    # fiducial template and a tiny covariance returns the inputs to < 0.002 (self-consistency
    # of the Xu et al. 2013 dilation, REFERENCES §7).
    d, cov = _data(1.04, 0.97)
    like = Likelihood(S, d, cov * 1e-6, (0, 2), _template(), FitSettings())
    x = best_fit(like)
    p = like.physical(x)
    assert abs(p["alpha_par"] - 1.04) < 0.002
    assert abs(p["alpha_perp"] - 0.97) < 0.002


def test_noise_free_recovery_isotropic_and_alpha_epsilon():
    # Same self-consistency for one alpha on the monopole (alpha = 1.03), and for sampling in
    # (alpha, epsilon) (Xu et al. 2013).
    d, cov = _data(1.03, 1.03, ells=(0,))
    st = FitSettings(analysis="isotropic")
    like = Likelihood(S, d, cov * 1e-6, (0,), _template(), st)
    assert like.names == ("alpha", "B")
    assert abs(best_fit(like)[0] - 1.03) < 0.002
    d, cov = _data(1.04, 0.97)
    st = FitSettings(parametrisation="alpha-epsilon")
    like = Likelihood(S, d, cov * 1e-6, (0, 2), _template(), st)
    p = like.physical(best_fit(like))
    assert abs(p["alpha_par"] - 1.04) < 0.002 and abs(p["alpha_perp"] - 0.97) < 0.002


def test_marginalised_chi2_equals_explicit_least_squares():
    # Linear least squares (numpy.linalg.lstsq on the whitened system) of the broadband at a
    # fixed template reproduces the precomputed-projector chi^2 (common practice).
    d, cov = _data(1.02, 0.99)
    d = d + np.random.default_rng(5).normal(0, np.sqrt(np.diag(cov)))
    like = Likelihood(S, d, cov, (0, 2), _template(), FitSettings())
    theta = np.array([1.01, 0.98, 1.2, 0.35])
    t = like.template_model(like.physical(theta))
    w = 1.0 / np.sqrt(np.diag(like.covariance))
    a, *_ = np.linalg.lstsq(like.design * w[:, None], (like.data - t) * w, rcond=None)
    chi2_ref = np.sum(((like.data - t - like.design @ a) * w) ** 2)
    assert like.chi2(theta) == pytest.approx(chi2_ref, rel=1e-9)
    r = like.data - t
    assert r @ like.marginal_precision @ r == pytest.approx(chi2_ref, rel=1e-9)
    np.testing.assert_allclose(like.broadband(theta).ravel(), a, rtol=1e-6, atol=1e-12)


def test_alpha_epsilon_check_values():
    # Xu et al. 2013 mapping, REFERENCES §7 [COMP]: (1.02, 0.99) -> (0.999901, 0.010001);
    # (0.97, 1.01) -> (0.996487, -0.013380).
    out = dilations_from_samples(("alpha_par", "alpha_perp"),
                                 np.array([[1.02, 0.99], [0.97, 1.01]]))
    np.testing.assert_allclose(out["alpha"], [0.999901, 0.996487], atol=1e-6)
    np.testing.assert_allclose(out["epsilon"], [0.010001, -0.013380], atol=1e-6)
    back = dilations_from_samples(("alpha", "epsilon"),
                                  np.column_stack([out["alpha"], out["epsilon"]]))
    np.testing.assert_allclose(back["alpha_par"], [1.02, 0.97], rtol=1e-12)


def test_bad_inputs_give_clear_errors():
    # common practice: each user error names what is wrong and how to fix it
    d, cov = _data(1.0, 1.0)
    tpl = _template()
    with pytest.raises(InputError, match="outside the measured bins"):
        Likelihood(S, d, cov, (0, 2), tpl, FitSettings(s_min=20.0))
    with pytest.raises(InputError, match="outside the measured bins"):
        Likelihood(S, d, cov, (0, 2), tpl, FitSettings(s_max=200.0))
    # a range reaching the outer bin edge (half the last spacing past the last centre) is
    # accepted even when the innermost centres lie closer together (volume-weighted centres)
    s_close = S.copy()
    s_close[0] = S[1] - 1.0
    edge = float(S[-1] + 0.5 * (S[-1] - S[-2]))
    like = Likelihood(s_close, d, cov, (0, 2), tpl, FitSettings(s_max=edge))
    assert like.s[-1] == S[-1]
    singular = np.ones_like(cov) * 1e-6
    with pytest.raises(InputError, match="singular"):
        Likelihood(S, d, singular, (0, 2), tpl, FitSettings())
    with pytest.raises(InputError, match="shape"):
        Likelihood(S, d[:-1], cov, (0, 2), tpl, FitSettings())
    with pytest.raises(InputError, match=r"multipoles \[4\]"):
        Likelihood(S, d, cov, (0, 2), tpl, FitSettings(ells=(0, 4)))
    for bad in (dict(alpha_min=1.1, alpha_max=1.05), dict(B_min=5.0, B_max=2.0),
                dict(s_min=120.0, s_max=80.0)):
        with pytest.raises(ConfigError, match="empty|below"):
            dataclasses.replace(FitSettings(), **bad).validate()


def test_wedge_data_vector_recovery():
    # Noise-free recovery with two mu wedges as data vector (same dilation self-consistency
    # as for multipoles, Xu et al. 2013; wedges as in Kazin et al. 2012 [from memory]).
    from corrpipe.theory.template import wedge_weights

    tpl = _template()
    mu, w = wedge_weights((0.0, 0.5, 1.0))
    d = tpl.projected(S, 1.04, 0.97, mu, w, B=1.3, beta=0.4, sigma_par=10.0, sigma_perp=6.0,
                      sigma_s=4.0).ravel()
    cov = np.diag(np.tile(1e-3 * 100.0 / S, 2) ** 2) * 1e-6
    like = Likelihood(S, d, cov, (), tpl, FitSettings(), wedges=(0.0, 0.5, 1.0))
    p = like.physical(best_fit(like))
    assert abs(p["alpha_par"] - 1.04) < 0.002 and abs(p["alpha_perp"] - 0.97) < 0.002


def test_free_damping_grid():
    # Free Sigma_par, Sigma_perp: the tabulated-and-interpolated template equals the direct
    # one on grid nodes (exact) and within 0.3 % of the model amplitude between them; the
    # noise-free self-consistency test then still recovers the dilations (< 0.002) and the
    # damping (< 0.3 Mpc/h). A coarse k grid keeps the tabulation cheap (internal check).
    lp = LinearPower.eisenstein_hu(Cosmology(), 0.5, k_min=1e-4, k_max=50.0, n_k=1024)
    tpl = BAOTemplate(lp, s_range=(10.0, 300.0), s_step=0.2, n_mu_power=24)
    truth = dict(B=1.3, beta=0.4, sigma_par=9.3, sigma_perp=5.4, sigma_s=4.0)
    d = tpl.multipoles(S, 1.04, 0.97, (0, 2), **truth).ravel()
    cov = np.diag(np.tile(1e-3 * 100.0 / S, 2) ** 2) * 1e-6
    st = FitSettings(sigma_prior_width=1.0, beta_prior_width=0.0)
    like = Likelihood(S, d, cov, (0, 2), tpl, st)
    assert like.names == ("alpha_par", "alpha_perp", "B", "sigma_par", "sigma_perp")
    node = dict(truth, sigma_par=like._damping_axes[0][3], sigma_perp=like._damping_axes[1][5],
                alpha_par=1.02, alpha_perp=0.99)
    direct = tpl.multipoles(like.s, 1.02, 0.99, (0, 2), B=1.3, beta=0.4,
                            sigma_par=node["sigma_par"], sigma_perp=node["sigma_perp"],
                            sigma_s=4.0).ravel()
    np.testing.assert_allclose(like.template_model(node), direct, rtol=1e-12, atol=1e-15)
    between = like.template_model(dict(truth, alpha_par=1.04, alpha_perp=0.97))
    assert np.max(np.abs(between - like.data)) < 3e-3 * np.max(np.abs(like.data))
    p = like.physical(best_fit(like))
    assert abs(p["alpha_par"] - 1.04) < 0.002 and abs(p["alpha_perp"] - 0.97) < 0.002
    assert abs(p["sigma_par"] - 9.3) < 0.3 and abs(p["sigma_perp"] - 5.4) < 0.3


@pytest.mark.parametrize("kw", [dict(), dict(analysis="isotropic"),
                                dict(parametrisation="alpha-epsilon"),
                                dict(beta_prior_width=0.0)])
def test_settings_count_the_parameters_the_likelihood_samples(kw):
    # The pipeline takes the Percival et al. (2014) parameter count from the settings; it must
    # equal what the likelihood actually samples and marginalises (internal consistency).
    settings = FitSettings(**kw)
    d, cov = _data(1.0, 1.0)
    like = Likelihood(S, d, cov, (0, 2), _template(), settings)
    assert settings.n_sampled_parameters == like.n_dim
    assert settings.n_fit_parameters == like.n_dim + like.n_broadband


def test_fit_settings_of_switches_to_the_post_reconstruction_model():
    # The pipeline's fit and `refit --multipoles` share this: with [reconstruct] enabled the
    # fit uses the post-reconstruction damping and the reconstruction's RSD convention and
    # smoothing (Padmanabhan et al. 2012 conventions; REFERENCES sec. 8); otherwise [fit] as is.
    from types import SimpleNamespace

    from corrpipe.stages.fit import fit_settings_of

    recon = SimpleNamespace(enabled=True, convention="keep-rsd", smoothing=10.0)
    got = fit_settings_of(SimpleNamespace(fit=FitSettings(), reconstruct=recon))
    assert got.reconstructed and got.recon_convention == "keep-rsd"
    assert got.smoothing_radius == 10.0
    assert got.damping == FitSettings(reconstructed=True).damping != FitSettings().damping
    off = SimpleNamespace(fit=FitSettings(), reconstruct=SimpleNamespace(enabled=False))
    assert fit_settings_of(off) == FitSettings()
