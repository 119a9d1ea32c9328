"""Fit entry point: template, likelihood, best fit, chain, chi^2 profile, summary."""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from scipy.optimize import minimize

from corrpipe.errors import InputError
from corrpipe.fit.likelihood import Likelihood
from corrpipe.fit.result import FitResult, dilations_from_samples, summarise_samples
from corrpipe.fit.sampler import run_chain
from corrpipe.fit.settings import FitSettings
from corrpipe.fit.terms import FRACTION, InterloperTerm, interloper_term_from_settings
from corrpipe.theory.damping import zeldovich_damping
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate

__all__ = ["fit_multipoles", "build_linear_power", "build_likelihood", "best_fit",
           "bao_detection", "prior_edges", "resolve_damping", "interloper_shift",
           "alpha_profile"]

_PENALTY = 1e30


def build_linear_power(cosmology: Any, z: float, settings: FitSettings) -> LinearPower:
    """Linear power at redshift ``z`` as the settings ask (EH98 or a tabulated file)."""
    if settings.power_spectrum == "file":
        return LinearPower.from_file(settings.power_file, cosmology, z=z,
                                     width_ln_k=settings.nowiggle_width)
    return LinearPower.eisenstein_hu(cosmology, z, "wiggle", normalisation=settings.normalisation,
                                     A_s=settings.A_s)


def resolve_damping(settings: FitSettings, linear_power: LinearPower, cosmology: Any,
                    z_eff: float) -> FitSettings:
    """Settings with empty damping scales filled from the linear power when
    ``damping_model = "zeldovich"`` (:func:`corrpipe.theory.damping.zeldovich_damping`);
    unchanged otherwise or when both scales are set."""
    if settings.damping_model != "zeldovich" or (settings.sigma_par is not None
                                                 and settings.sigma_perp is not None):
        return settings
    par, perp = zeldovich_damping(linear_power, float(np.asarray(cosmology.growth_rate(z_eff))),
                                  reconstructed=settings.reconstructed,
                                  smoothing_radius=settings.smoothing_radius)
    return dataclasses.replace(
        settings, sigma_par=par if settings.sigma_par is None else settings.sigma_par,
        sigma_perp=perp if settings.sigma_perp is None else settings.sigma_perp)


def build_likelihood(s, data_vector, covariance, ells: Sequence[int], *, cosmology: Any,
                     z_eff: float, settings: FitSettings = FitSettings(),
                     precision_factor: float = 1.0,
                     linear_power: LinearPower | None = None,
                     progress: bool = False) -> Likelihood:
    """Template at the fiducial cosmology and the likelihood of the given data."""
    settings.validate()
    lp = linear_power if linear_power is not None else build_linear_power(cosmology, z_eff,
                                                                          settings)
    settings = resolve_damping(settings, lp, cosmology, z_eff)
    template = BAOTemplate.from_settings(lp, settings)
    terms = []
    if settings.interloper_term:
        terms.append(interloper_term_from_settings(settings, cosmology, z_eff, lp))
    return Likelihood(s, data_vector, covariance, ells, template, settings,
                      precision_factor=precision_factor, progress=progress, terms=terms)


def _objective(like: Likelihood):
    def f(theta):
        v = like.log_posterior(theta)
        return -2.0 * v if np.isfinite(v) else _PENALTY
    return f


def best_fit(like: Likelihood, n_grid: int = 9) -> np.ndarray:
    """Maximum-posterior point: a coarse scan of the dilations (B solved linearly), then
    Nelder-Mead over all sampled parameters (scipy.optimize.minimize)."""
    st = like.settings
    start = like.start()
    grid = np.linspace(st.alpha_min + 0.02, st.alpha_max - 0.02, n_grid)
    i_b = like.names.index("B")
    p_b = like.parameters[i_b]
    f = _objective(like)
    best, best_val = start.copy(), f(start)
    if st.analysis == "isotropic":
        candidates = [(a,) for a in grid]
    elif st.parametrisation == "alpha-epsilon":
        eps = np.linspace(-0.8 * st.epsilon_max, 0.8 * st.epsilon_max, 7)
        candidates = [(a, e) for a in grid for e in eps]
    else:
        candidates = [(a, b) for a in grid for b in grid]
    for cand in candidates:
        theta = start.copy()
        theta[:len(cand)] = cand
        b = like.best_amplitude(like.physical(theta))
        if not np.isfinite(b):
            continue
        theta[i_b] = np.clip(b, p_b.low * 1.001, p_b.high * 0.999)
        val = f(theta)
        if val < best_val:
            best, best_val = theta, val
    res = minimize(f, best, method="Nelder-Mead",
                   options={"xatol": 1e-6, "fatol": 1e-7, "maxiter": 8000, "maxfev": 16000})
    res = minimize(f, res.x, method="Nelder-Mead",
                   options={"xatol": 1e-7, "fatol": 1e-8, "maxiter": 8000, "maxfev": 16000})
    return res.x if res.fun <= best_val else best


def alpha_profile(like: Likelihood, best: np.ndarray, n_points: int,
                  half_width: float | None = None) -> dict:
    """chi^2 profile over alpha_iso, every other parameter re-minimised at each point.

    The grid spans alpha_best +- ``half_width`` (inside the prior), or the whole prior range
    when ``half_width`` is None.

    The minimised quantity is -2 ln posterior (chi^2 plus the Gaussian prior terms). The
    1-sigma interval is where the profile rises by 1 above its minimum (Wilks' theorem for
    one parameter; common practice).
    """
    st = like.settings
    names = like.names
    anisotropic = st.analysis == "anisotropic"
    phys_best = like.physical(best)
    alpha_best = float(np.cbrt(phys_best["alpha_par"] * phys_best["alpha_perp"] ** 2))
    eps_best = float(np.cbrt(phys_best["alpha_par"] / phys_best["alpha_perp"]) - 1.0)
    rest_names = [n for n in names if n not in ("alpha", "epsilon", "alpha_par", "alpha_perp")]
    rest_idx = [names.index(n) for n in rest_names]

    def theta_of(alpha: float, x: np.ndarray) -> np.ndarray:
        theta = best.copy()
        if anisotropic:
            eps = x[0]
            if "alpha_par" in names:
                theta[0], theta[1] = alpha * (1.0 + eps) ** 2, alpha / (1.0 + eps)
            else:
                theta[0], theta[1] = alpha, eps
            theta[rest_idx] = x[1:]
        else:
            theta[0] = alpha
            theta[rest_idx] = x
        return theta

    f = _objective(like)
    if half_width is None:
        grid = np.linspace(st.alpha_min, st.alpha_max, n_points)
    else:
        grid = np.linspace(max(st.alpha_min, alpha_best - half_width),
                           min(st.alpha_max, alpha_best + half_width), n_points)
    values = np.empty(n_points)
    x0_best = np.concatenate([[eps_best] if anisotropic else [], best[rest_idx]])
    order = np.argsort(np.abs(grid - alpha_best))
    x_prev = {}
    for i in order:
        # warm start from the nearest already-profiled point
        done = [j for j in x_prev]
        x0 = x_prev[min(done, key=lambda j: abs(j - i))] if done else x0_best
        res = minimize(lambda x: f(theta_of(grid[i], x)), x0, method="Nelder-Mead",
                       options={"xatol": 1e-6, "fatol": 1e-6, "maxiter": 4000})
        values[i] = res.fun
        x_prev[i] = res.x
    chi2_min = min(float(values.min()), f(best))
    delta = values - chi2_min
    lo, hi = _crossings(grid, delta, alpha_best)
    return {"alpha": grid, "delta_chi2": delta, "alpha_best": alpha_best,
            "error_minus": None if lo is None else alpha_best - lo,
            "error_plus": None if hi is None else hi - alpha_best,
            "minimum_chi2": chi2_min}


def _crossings(grid: np.ndarray, delta: np.ndarray, centre: float) -> tuple:
    """Where delta chi^2 crosses 1 on each side of ``centre`` (linear interpolation)."""
    lo = hi = None
    for j in range(len(grid) - 1):
        a, b = delta[j], delta[j + 1]
        if (a - 1.0) * (b - 1.0) <= 0 and a != b:
            x = grid[j] + (1.0 - a) * (grid[j + 1] - grid[j]) / (b - a)
            if x < centre and (a > b):
                lo = x
            elif x > centre and (b > a) and hi is None:
                hi = x
    return lo, hi


def _data_hash(*arrays) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(np.ascontiguousarray(np.asarray(a, dtype=float)).tobytes())
    return h.hexdigest()[:16]


def _init_scale(like: Likelihood, best: np.ndarray) -> np.ndarray:
    scale = []
    for p, x in zip(like.parameters, best):
        if p.name in ("alpha", "alpha_par", "alpha_perp", "epsilon"):
            scale.append(3e-3)
        elif p.name == "B":
            scale.append(0.01 * abs(x))
        else:
            scale.append(0.02 * max(abs(x), 1.0))
    return np.array(scale)


def bao_detection(like: Likelihood, best: np.ndarray) -> dict:
    """chi^2 of the best fit against that of a template without BAO (same data and priors).

    The no-BAO model replaces the linear power by its no-wiggle counterpart (so the template
    keeps its broadband shape, RSD and damping terms but loses the acoustic feature) and is
    fitted over the same parameters. sqrt(Delta chi^2) is the usual detection significance
    (common practice, e.g. Eisenstein et al. 2005 [from memory]).

    Returns
    -------
    dict
        ``chi2_bao``, ``chi2_no_bao``, ``delta_chi2`` and ``significance_sigma``
        (sqrt of Delta chi^2, 0 when the no-BAO model fits as well).
    """
    lp = like.template.linear_power
    smooth = dataclasses.replace(lp, power=np.array(lp.power_nowiggle, copy=True),
                                 source=f"{lp.source} without BAO")
    # like.s already holds only the fitted bins
    settings = dataclasses.replace(like.settings, sigma_prior_width=0.0,
                                   s_min=float(like.s[0]), s_max=float(like.s[-1]))
    template = BAOTemplate.from_settings(smooth, settings)
    wedges = like.wedges
    plain = Likelihood(like.s, like.data, like.covariance,
                       like.ells if wedges is None else (), template, settings,
                       precision_factor=like.precision_factor, wedges=wedges, terms=like.terms)
    chi2_bao = like.chi2(best)
    chi2_none = plain.chi2(best_fit(plain))
    delta = chi2_none - chi2_bao
    return {"chi2_bao": float(chi2_bao), "chi2_no_bao": float(chi2_none),
            "delta_chi2": float(delta), "significance_sigma": float(np.sqrt(max(delta, 0.0)))}


def interloper_shift(like: Likelihood, best: np.ndarray) -> dict:
    """What the interloper term does to the fit: the same fit without it, best fit to best fit.

    Returns
    -------
    dict
        The term's mapping (:meth:`InterloperTerm.describe`), the best-fit fraction,
        ``best_fit`` (dilations with the term) and ``best_fit_without_term``, the
        ``shift`` of each dilation (with minus without), and both chi^2 values.
    """
    term = next(t for t in like.terms if isinstance(t, InterloperTerm))
    rest = tuple(t for t in like.terms if t is not term)
    wedges = like.wedges
    plain = Likelihood(like.s, like.data, like.covariance, like.ells if wedges is None else (),
                       like.template, dataclasses.replace(
                           like.settings, target_line="", interloper_line="",
                           s_min=float(like.s[0]), s_max=float(like.s[-1])),
                       precision_factor=like.precision_factor, wedges=wedges, terms=rest)
    best_plain = best_fit(plain)

    def dilations(lk, theta):
        p = lk.physical(theta)
        return {"alpha_par": p["alpha_par"], "alpha_perp": p["alpha_perp"],
                "alpha": float(np.cbrt(p["alpha_par"] * p["alpha_perp"] ** 2))}

    with_term, without = dilations(like, best), dilations(plain, best_plain)
    return {"mapping": term.describe(), "fraction_best_fit": like.physical(best)[FRACTION],
            "best_fit": with_term, "best_fit_without_term": without,
            "shift": {k: with_term[k] - without[k] for k in with_term},
            "chi2": like.chi2(best), "chi2_without_term": plain.chi2(best_plain)}


def prior_edges(like: Likelihood, samples: np.ndarray, edge_fraction: float = 0.05,
                limit: float = 0.10) -> dict:
    """How much of each dilation's posterior sits next to its flat prior bounds.

    Parameters
    ----------
    like : Likelihood
    samples : ndarray, shape (n_samples, n_dim)
        Posterior samples in ``like.names`` order.
    edge_fraction : float
        Width of the strip next to each bound, as a fraction of the prior range.
    limit : float
        Posterior mass in the two strips above which the parameter is flagged.

    Returns
    -------
    dict
        Per sampled dilation (alpha, epsilon, alpha_par, alpha_perp): ``edge_mass`` and
        ``prior_limited`` (True when the prior, not the data, bounds the posterior, so the
        quoted error depends on the prior range; common practice).
    """
    out = {}
    for i, p in enumerate(like.parameters):
        if p.name not in ("alpha", "epsilon", "alpha_par", "alpha_perp"):
            continue
        strip = edge_fraction * (p.high - p.low)
        x = samples[:, i]
        mass = float(np.mean((x < p.low + strip) | (x > p.high - strip)))
        out[p.name] = {"edge_mass": mass, "prior_limited": bool(mass > limit),
                       "prior": [float(p.low), float(p.high)]}
    return out


def fit_multipoles(s, data_vector, covariance, ells: Sequence[int], *, cosmology: Any,
                   z_eff: float, settings: FitSettings = FitSettings(),
                   progress_path: str | Path | None = None, progress: bool = True,
                   seed: int | None = None, covariance_type: str = "unknown",
                   precision_factor: float = 1.0, variance_factor: float = 1.0,
                   name: str = "main", linear_power: LinearPower | None = None) -> FitResult:
    """Fit the BAO template to correlation-function multipoles and summarise the posterior.

    Parameters
    ----------
    s : array_like, shape (n_s,)
        Separation bin centres, Mpc/h.
    data_vector : array_like, shape (len(ells) * n_s,)
        Multipoles, one block per ell in the order of ``ells``.
    covariance : array_like
        Covariance of ``data_vector``.
    ells : sequence of int
        Multipoles present in ``data_vector``.
    cosmology : corrpipe.cosmology.Cosmology
        Fiducial cosmology (template and distances).
    z_eff : float
        Effective redshift of the data.
    settings : FitSettings
        Fit range, template, priors, sampler.
    progress_path : str or Path, optional
        emcee HDF5 progress file; an interrupted chain with the same settings and data
        continues from its last step.
    progress : bool
        Show progress bars.
    seed : int, optional
        Sampler seed (default ``settings.seed``).
    covariance_type : str
        Where the covariance came from (``"jackknife"``, ``"mocks"``, ...), for the summary.
    precision_factor : float
        Factor applied to the inverse covariance (Hartlap et al. 2007).
    variance_factor : float
        Percival et al. (2014) m1; reported errors are multiplied by sqrt(m1).
    name : str
        Analysis name.
    linear_power : LinearPower, optional
        Use this spectrum instead of building one from the settings.

    Returns
    -------
    FitResult
    """
    if not (variance_factor > 0):
        raise InputError(f"fit: the variance factor m1 must be positive, got {variance_factor}")
    seed = settings.seed if seed is None else int(seed)
    like = build_likelihood(s, data_vector, covariance, ells, cosmology=cosmology, z_eff=z_eff,
                            settings=settings, precision_factor=precision_factor,
                            linear_power=linear_power, progress=progress)
    ml = best_fit(like)
    model_hash = "-".join([settings.model_hash(), _data_hash(s, data_vector, covariance, ells,
                                                              [z_eff, precision_factor]),
                           repr(cosmology), str(seed)])
    model_hash = hashlib.sha256(model_hash.encode()).hexdigest()[:24]
    chain = run_chain(like.log_posterior, ml, n_walkers=settings.n_walkers, seed=seed,
                      progress_path=progress_path, model_hash=model_hash,
                      max_steps=settings.max_steps, check_every=settings.check_every,
                      tau_factor=settings.tau_factor, tau_tolerance=settings.tau_tolerance,
                      init_scale=_init_scale(like, ml), progress=progress)
    # Best fit: the better of the optimiser and the best chain sample.
    flat_lp = chain.log_prob.reshape(-1)
    j = int(np.argmax(flat_lp))
    if flat_lp[j] > like.log_posterior(ml):
        ml = chain.chain.reshape(-1, like.n_dim)[j].copy()
    profile = None
    if settings.profile_points:
        # grid over +- 5 posterior widths of alpha_iso, so the Delta chi^2 = 1 crossings are
        # resolved by several points
        alpha_iso = dilations_from_samples(like.names, chain.samples())["alpha"]
        profile = alpha_profile(like, ml, settings.profile_points,
                                half_width=5.0 * float(np.std(alpha_iso)))
    result = summarise(like, chain, ml, profile, cosmology=cosmology, z_eff=z_eff,
                       covariance_type=covariance_type, variance_factor=variance_factor,
                       name=name)
    result.diagnostics = {"bao_detection": bao_detection(like, ml),
                          "prior_edges": prior_edges(like, chain.samples())}
    if like.terms:
        result.diagnostics["interlopers"] = interloper_shift(like, ml)
    return result


def summarise(like: Likelihood, chain, ml: np.ndarray, profile: dict | None, *,
              cosmology: Any, z_eff: float, covariance_type: str, variance_factor: float,
              name: str) -> FitResult:
    """Posterior summaries, derived dilations and distances (errors scaled by sqrt(m1)).

    Distances: D_M/r_d = alpha_perp (D_M/r_d)_fid, D_H/r_d = alpha_par (D_H/r_d)_fid,
    D_V/r_d = alpha_par^(1/3) alpha_perp^(2/3) (D_V/r_d)_fid (REFERENCES §7), per chain
    sample (no linearisation), where the fiducial r_d is the template's sound horizon (the
    scale its wiggles sit at; EH98 eq. 6 for an EH98 template).
    """
    st = like.settings
    samples = chain.samples()
    scale = float(np.sqrt(variance_factor))
    summary = {n: summarise_samples(samples[:, i], scale) for i, n in enumerate(like.names)}
    dil = dilations_from_samples(like.names, samples)
    for k, v in dil.items():
        summary[k] = summarise_samples(v, scale)
    # Samples widened about the median by sqrt(m1), for derived distances.
    wide = {k: np.median(v) + scale * (v - np.median(v)) for k, v in dil.items()}
    # alpha measures the BAO scale against the template's, so D/r_d = alpha D_fid / r_d,tpl.
    r_d_template = float(like.template.linear_power.sound_horizon)
    rescale = float(cosmology.sound_horizon()) / r_d_template
    fid = {k: float(np.asarray(v)) * rescale
           for k, v in cosmology.distance_ratios(z_eff).items()}
    distances = {}
    corr = None
    if st.analysis == "isotropic":
        distances["DV_over_rd"] = dict(summarise_samples(wide["alpha"] * fid["DV_over_rd"]),
                                       fiducial=fid["DV_over_rd"])
    else:
        a_par, a_perp = wide["alpha_par"], wide["alpha_perp"]
        distances["DM_over_rd"] = dict(summarise_samples(a_perp * fid["DM_over_rd"]),
                                       fiducial=fid["DM_over_rd"])
        distances["DH_over_rd"] = dict(summarise_samples(a_par * fid["DH_over_rd"]),
                                       fiducial=fid["DH_over_rd"])
        distances["DV_over_rd"] = dict(
            summarise_samples(np.cbrt(a_par * a_perp**2) * fid["DV_over_rd"]),
            fiducial=fid["DV_over_rd"])
        corr = float(np.corrcoef(dil["alpha_par"], dil["alpha_perp"])[0, 1])
    phys = like.physical(ml)
    best = {n: float(x) for n, x in zip(like.names, ml)}
    best.update({k: float(v) for k, v in phys.items()})
    best["alpha"] = float(np.cbrt(phys["alpha_par"] * phys["alpha_perp"] ** 2))
    best["epsilon"] = float(np.cbrt(phys["alpha_par"] / phys["alpha_perp"]) - 1.0)
    chi2 = like.chi2(ml)
    dof = like.n_data - like.n_broadband - like.n_dim
    convergence = {"converged": chain.converged, "n_steps": chain.n_steps,
                   "n_walkers": int(chain.chain.shape[1]), "tau": chain.tau.tolist(),
                   "tau_factor": st.tau_factor, "burn": chain.burn, "thin": chain.thin,
                   "n_samples": int(samples.shape[0]), "acceptance": chain.acceptance,
                   "resumed_from": chain.resumed_from, "note": chain.note}
    template = like.template
    fiducial = dict(fid, r_d_template_Mpc=r_d_template,
                    r_d_fiducial_Mpc=float(cosmology.sound_horizon()),
                    B_prior_centre=float(like.B_centre), B_prior_used=like.B_prior_used)
    if profile is not None and profile["error_minus"] is not None and \
            profile["error_plus"] is not None:
        profile["error_minus_scaled"] = scale * profile["error_minus"]
        profile["error_plus_scaled"] = scale * profile["error_plus"]
    t_model = like.template_model(phys)
    data = {"s": like.s, "ells": np.array(like.ells), "data_vector": like.data,
            "errors": like.errors, "model": like.full_model(ml), "model_template": t_model,
            "broadband": like.broadband(ml)}
    return FitResult(name=name, analysis=st.analysis, z_eff=float(z_eff), names=like.names,
                     chain=chain.chain, log_prob=chain.log_prob, burn=chain.burn,
                     thin=chain.thin, best_fit=best, chi2=float(chi2), dof=int(dof),
                     summary=summary, distances=distances, fiducial=fiducial,
                     convergence=convergence, covariance_type=covariance_type,
                     variance_factor=float(variance_factor),
                     precision_factor=float(like.precision_factor),
                     correlation_par_perp=corr, profile=profile, settings=st.to_dict(),
                     data=data)
