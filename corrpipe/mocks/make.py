"""Make and write the mocks a :class:`MockSettings` table describes (the mock command's work)."""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Mapping

import numpy as np

from corrpipe.errors import ConfigError, InputError
from corrpipe.mocks.box import BoxMock, lognormal_box, zeldovich_box
from corrpipe.mocks.dilation import Dilation, expected_dilation
from corrpipe.mocks.settings import MockSettings
from corrpipe.mocks.survey import (SurveyMock, carve_survey, survey_randoms, tabulated_nz,
                                   write_box_catalogue, write_sky_catalogue)

__all__ = ["MockFiles", "true_cosmology", "mock_power", "make_box_mock", "make_survey_mock",
           "make_interloper_mix", "make_survey_interloper_mix",
           "footprint_of", "nz_of", "write_mocks", "effective_redshift"]

_LOS = {"x": 0, "y": 1, "z": 2}


@dataclass(frozen=True)
class MockFiles:
    """What one written mock consists of.

    Attributes
    ----------
    data : Path
        Catalogue file.
    randoms : Path or None
        Matching random catalogue (survey mode with randoms_factor > 0).
    truth : Path
        JSON file with the settings, the seed and the expected dilation.
    n_objects : int
        Number of objects in the data catalogue.
    dilation : Dilation
        Expected dilation against the fiducial cosmology.
    """

    data: Path
    randoms: Path | None
    truth: Path
    n_objects: int
    dilation: Dilation


def true_cosmology(settings: MockSettings):
    """The cosmology the mocks are made in: ``true_preset`` with the ``true_*`` overrides."""
    from corrpipe.cosmology import preset

    base = preset(settings.true_preset)
    overrides = {name: getattr(settings, "true_" + name)
                 for name in ("h", "omega_m", "omega_b", "sigma8", "w0")
                 if getattr(settings, "true_" + name) is not None}
    return dataclasses.replace(base, **overrides) if overrides else base


def mock_power(settings: MockSettings, cosmology) -> Callable:
    """Linear matter P(k) at the box redshift: EH98 of ``cosmology`` or the ``power_file``."""
    from corrpipe.theory.linear_power import LinearPower

    if settings.power_file:
        return LinearPower.from_file(settings.power_file, cosmology, z=settings.redshift)
    return LinearPower.eisenstein_hu(cosmology, z=settings.redshift)


def _growth_rate(settings: MockSettings, cosmology) -> float:
    if not settings.rsd:
        return 0.0
    if settings.growth_rate is not None:
        return float(settings.growth_rate)
    return float(np.asarray(cosmology.growth_rate(settings.redshift)))


def make_box_mock(settings: MockSettings, seed: int, *, cosmology=None, power=None,
                  progress: bool = True) -> BoxMock:
    """Draw one box mock with the settings' generator."""
    cosmology = true_cosmology(settings) if cosmology is None else cosmology
    power = mock_power(settings, cosmology) if power is None else power
    dtype = np.float32 if settings.precision == "float32" else np.float64
    common = dict(alpha_par=settings.alpha_par, alpha_perp=settings.alpha_perp,
                  los_axis=_LOS[settings.los_axis], dtype=dtype, progress=progress)
    args = (power, settings.box_size, settings.n_mesh, settings.nbar, settings.bias,
            _growth_rate(settings, cosmology), seed)
    if settings.kind == "lognormal":
        return lognormal_box(*args, **common)
    return zeldovich_box(*args, bias_smoothing=settings.bias_smoothing,
                         lagrangian_positions=settings.lagrangian_positions, **common)


def make_interloper_mix(settings: MockSettings, seed: int, *, cosmology=None, power=None,
                        progress: bool = True):
    """Target box at density (1 - sum f) nbar plus each ``[[mock.interlopers]]`` population,
    drawn at its true redshift and moved to the assigned frame (:mod:`corrpipe.mocks.interlopers`).

    Population k is drawn with seed ``[seed, 100 + k]``; the target with the plain ``seed``
    and a reduced density (so its field is the one :func:`make_box_mock` draws).
    """
    from corrpipe.mocks.interlopers import interloper_box, mix_box, populations_of
    from corrpipe.theory.linear_power import LinearPower

    cosmology = true_cosmology(settings) if cosmology is None else cosmology
    pops = populations_of(settings.interlopers, settings.target_line, settings.redshift,
                          cosmology, settings.line_medium)
    keep = 1.0 - sum(p.max_fraction for p in pops)
    target = make_box_mock(dataclasses.replace(settings, nbar=settings.nbar * keep,
                                               interlopers=()), seed,
                           cosmology=cosmology, power=power, progress=progress)
    from corrpipe.theory.interlopers import line_mapping

    dtype = np.float32 if settings.precision == "float32" else np.float64
    boxes = []
    for k, pop in enumerate(pops, start=1):
        mapping = line_mapping(cosmology, settings.target_line, pop.line, settings.redshift,
                               medium=settings.line_medium)
        z_true = float(mapping.z_true)
        p_true = LinearPower.eisenstein_hu(cosmology, z=z_true)
        growth = float(np.asarray(cosmology.growth_rate(z_true))) if settings.rsd else 0.0
        extra = {"bias_smoothing": settings.bias_smoothing} if settings.kind == "zeldovich" else {}
        boxes.append(interloper_box(p_true, mapping, settings.box_size, settings.n_mesh,
                                    settings.nbar * pop.max_fraction, pop.bias, growth,
                                    np.random.default_rng([seed, 100 + k]), kind=settings.kind,
                                    alpha_par=settings.alpha_par,
                                    alpha_perp=settings.alpha_perp,
                                    los_axis=_LOS[settings.los_axis], dtype=dtype,
                                    progress=progress, **extra))
    return mix_box(target, boxes, [p.max_fraction for p in pops], rsd=settings.rsd)


def _interloper_settings(settings: MockSettings, pop, z_true: float, nbar: float):
    """The [mock] table of one interloper population's own box (its redshift, bias, density)."""
    return dataclasses.replace(settings, interlopers=(), redshift=z_true, bias=pop.bias,
                               nbar=nbar, growth_rate=None, power_file=None)


def make_survey_interloper_mix(settings: MockSettings, seed: int, *, cosmology=None,
                               power=None, progress: bool = True):
    """Survey mock with ``[[mock.interlopers]]`` populations at their assigned redshifts.

    The target is carved with n(z) (1 - sum_k f_k(z)); population k is drawn in its own box
    at the true redshift of the box redshift (its P(k), bias and growth rate; seed
    ``[seed, 100 + k]``), carved over the true redshifts that map onto z_min..z_max with the
    density f_k(z_a) n(z_a) gamma_perp^2 gamma_par at z_a = its assigned redshift (number
    conservation: the mapping stretches volumes by gamma_perp^2 gamma_par), with its own
    radial RSD, and then given z_a from its observed redshift. Angles are kept.

    Returns
    -------
    (SurveyMock, ndarray of int8, dict)
        The mixed catalogue (``z`` assigned, ``z_cosmo`` true cosmological), the population
        label of each object (0 target), and the truth record (requested fraction nodes,
        realised fractions in five assigned-redshift bins, the mapping at the box redshift).
    """
    from corrpipe.mocks.interlopers import populations_of
    from corrpipe.theory.interlopers import (assigned_redshift, line_mapping, rest_wavelength,
                                             true_redshift)
    cosmology = true_cosmology(settings) if cosmology is None else cosmology
    z_lo, z_hi = settings.z_min, settings.z_max
    pops = populations_of(settings.interlopers, settings.target_line,
                          (z_lo, z_hi, settings.redshift), cosmology, settings.line_medium)
    base_nz = nz_of(settings)
    if base_nz is None:
        def base_nz(z):
            return np.full(np.shape(z), settings.nbar)

    def target_nz(z):
        return base_nz(z) * (1.0 - np.sum([p.fraction_at(z) for p in pops], axis=0))

    footprint = footprint_of(settings)
    plain = dataclasses.replace(settings, interlopers=())
    box = make_box_mock(plain, seed, cosmology=cosmology, power=power, progress=progress)
    common = dict(observer=settings.observer, rsd=settings.rsd, replicate=settings.replicate)
    parts = [carve_survey(box, cosmology, footprint, z_lo, z_hi, nz=target_nz,
                          seed=np.random.default_rng([seed, 1]), **common)]
    del box
    lam_t = rest_wavelength(settings.target_line, settings.line_medium)
    mappings = []
    for k, pop in enumerate(pops, start=1):
        lam_i = rest_wavelength(pop.line, settings.line_medium)
        zi_lo, zi_hi = (float(v) for v in true_redshift([z_lo, z_hi], lam_i, lam_t))

        def nz_i(z_true, pop=pop, lam_i=lam_i):
            z_a = np.clip(assigned_redshift(z_true, lam_i, lam_t), z_lo, z_hi)
            m = line_mapping(cosmology, settings.target_line, pop.line, z_a,
                             medium=settings.line_medium)
            return pop.fraction_at(z_a) * base_nz(z_a) * m.gamma_perp**2 * m.gamma_par

        peak = float(np.max(nz_i(np.linspace(zi_lo, zi_hi, 512))))
        z_box = float(true_redshift(settings.redshift, lam_i, lam_t))
        mappings.append(line_mapping(cosmology, settings.target_line, pop.line,
                                     settings.redshift, medium=settings.line_medium).as_dict())
        if peak <= 0:
            continue
        own = _interloper_settings(settings, pop, z_box, 1.02 * peak)
        p_true = mock_power(own, cosmology)
        if settings.power_file:  # the table is the target's: scale it to the true redshift
            tab = mock_power(settings, cosmology)
            ratio = float(cosmology.growth_factor(z_box) / cosmology.growth_factor(
                settings.redshift)) ** 2
            p_true = dataclasses.replace(tab, power=tab.power * ratio,
                                         power_nowiggle=tab.power_nowiggle * ratio, z=z_box)
        ibox = make_box_mock(own, np.random.default_rng([seed, 100 + k]), cosmology=cosmology,
                             power=p_true, progress=progress)
        sky = carve_survey(ibox, cosmology, footprint, zi_lo, zi_hi, nz=nz_i,
                           seed=np.random.default_rng([seed, 200 + k]), **common)
        z_a = assigned_redshift(sky.z, lam_i, lam_t)
        keep = (z_a >= z_lo) & (z_a < z_hi)
        parts.append(dataclasses.replace(sky, ra=sky.ra[keep], dec=sky.dec[keep], z=z_a[keep],
                                         z_cosmo=sky.z_cosmo[keep],
                                         weights=sky.weights[keep]))
        parts[-1].meta["population"] = k
    labels = np.concatenate([np.full(len(p), p.meta.get("population", 0), dtype=np.int8)
                             for p in parts])
    mixed = SurveyMock(ra=np.concatenate([p.ra for p in parts]),
                       dec=np.concatenate([p.dec for p in parts]),
                       z=np.concatenate([p.z for p in parts]),
                       z_cosmo=np.concatenate([p.z_cosmo for p in parts]),
                       weights=np.concatenate([p.weights for p in parts]),
                       meta=dict(parts[0].meta))
    edges = np.linspace(z_lo, z_hi, 6)
    idx = np.clip(np.digitize(mixed.z, edges) - 1, 0, 4)
    n_bin = np.bincount(idx, minlength=5)
    realised = [(np.bincount(idx[labels == k], minlength=5) / np.maximum(n_bin, 1)).tolist()
                for k in range(1, len(pops) + 1)]
    truth = {"fraction_nodes": [{"line": p.line, "fraction": list(p.fraction),
                                 "fraction_z": list(p.fraction_z)} for p in pops],
             "z_bin_edges": edges.tolist(), "n_per_bin": n_bin.tolist(),
             "fractions_realised": realised,
             "n_per_population": np.bincount(labels, minlength=len(pops) + 1).tolist(),
             "mappings": mappings}
    return mixed, labels, truth


def zeldovich_expectation(settings: MockSettings, s, ells, *, alpha_par: float = 1.0,
                          alpha_perp: float = 1.0, cosmology=None, fiducial=None,
                          n_mu: int = 8) -> np.ndarray:
    """Noise-free multipoles that Zel'dovich mocks of these settings should measure.

    The Zel'dovich correlation function of the mocks' Lagrangian-biased tracers
    (:mod:`corrpipe.theory.zeldovich`), with the bias moments of their clipped selection
    weights on the mock mesh (:func:`corrpipe.mocks.box.clipped_bias_moments`), plane-parallel
    redshift-space distortions at the box redshift, seen through the dilation
    (alpha_par, alpha_perp) of the analysis coordinates. Fitting it shows the dilation a fit
    recovers from the mean of many such mocks, mode coupling included.

    Parameters
    ----------
    settings : MockSettings
        Zel'dovich mock definition (box or survey).
    s : array_like
        Separations of the analysis, Mpc/h (e.g. the estimate's bin centres).
    ells : sequence of int
        Even multipoles.
    alpha_par, alpha_perp : float
        Expected dilation (true over fiducial D/r_d, :func:`expected_dilation`; for a
        stretched box, the stretch).
    cosmology : corrpipe.cosmology.Cosmology, optional
        The true cosmology (default from the settings).
    fiducial : corrpipe.cosmology.Cosmology, optional
        The analysis cosmology, when it differs from the true one: the true separations in
        Mpc/h are then alpha (r_d h)_true / (r_d h)_fid times the analysis ones (the
        dilation is a ratio of distances in units of each cosmology's r_d).
    n_mu : int
        Gauss-Legendre nodes on 0 < mu < 1.

    Returns
    -------
    ndarray, shape (len(ells), len(s))
    """
    from corrpipe.mocks.box import clipped_bias_moments, lagrangian_bias_for
    from corrpipe.mocks.fields import mesh_variance, power_on_mesh
    from corrpipe.theory.zeldovich import ZeldovichFunctions, zeldovich_multipoles

    if settings.kind != "zeldovich":
        raise InputError(f"zeldovich_expectation: the mocks are {settings.kind!r}, not "
                         "Zel'dovich ones")
    if settings.bias_smoothing:
        raise InputError("zeldovich_expectation: smoothed selection weights "
                         "(bias_smoothing > 0) give a scale-dependent bias that is not modelled")
    cosmology = true_cosmology(settings) if cosmology is None else cosmology
    power = mock_power(settings, cosmology)
    sigma_w = float(np.sqrt(mesh_variance(power_on_mesh(power, settings.n_mesh,
                                                        settings.box_size),
                                          settings.box_size)))
    b1, b2 = clipped_bias_moments(lagrangian_bias_for(settings.bias, sigma_w), sigma_w)
    scale = 1.0
    if fiducial is not None:
        scale = (float(cosmology.sound_horizon()) * cosmology.h
                 / (float(fiducial.sound_horizon()) * fiducial.h))
    funcs = ZeldovichFunctions(power)
    return zeldovich_multipoles(funcs, s, ells, b1=b1, b2=b2, f=_growth_rate(settings, cosmology),
                                alpha_par=alpha_par * scale, alpha_perp=alpha_perp * scale,
                                n_mu=n_mu)


def footprint_of(settings: MockSettings):
    """The union of the settings' RA/Dec boxes as a :class:`corrpipe.survey.footprint.BoxFootprint`."""
    from corrpipe.survey.footprint import BoxFootprint, SkyBox

    boxes = []
    for i, entry in enumerate(settings.footprint):
        try:
            boxes.append(SkyBox(*[float(v) for v in entry]))
        except (ConfigError, TypeError, ValueError) as exc:
            raise ConfigError(f"mock.footprint[{i}] = {list(entry)}: {exc}") from exc
    return BoxFootprint(include=tuple(boxes))


def nz_of(settings: MockSettings) -> Callable | None:
    """The target n(z) of the settings (None: constant nbar)."""
    if not settings.nz_redshifts:
        return None
    return tabulated_nz(settings.nz_redshifts, settings.nz_densities)


def make_survey_mock(settings: MockSettings, seed: int, *, cosmology=None, power=None,
                     progress: bool = True) -> SurveyMock:
    """Draw one box mock and carve the settings' survey out of it."""
    cosmology = true_cosmology(settings) if cosmology is None else cosmology
    box = make_box_mock(settings, seed, cosmology=cosmology, power=power, progress=progress)
    return carve_survey(box, cosmology, footprint_of(settings), settings.z_min, settings.z_max,
                        observer=settings.observer, nz=nz_of(settings), rsd=settings.rsd,
                        replicate=settings.replicate, seed=np.random.default_rng([seed, 1]))


def effective_redshift(z, weights=None) -> float:
    """Weighted mean redshift of a sample (the usual simple z_eff; common practice)."""
    z = np.asarray(z, dtype=float)
    if z.size == 0:
        raise InputError("cannot take the effective redshift of an empty sample")
    w = np.ones_like(z) if weights is None else np.asarray(weights, dtype=float)
    return float(np.sum(w * z) / np.sum(w))


def write_mocks(settings: MockSettings, output_dir, *, fiducial=None, progress: bool = True,
                echo: Callable | None = None, overwrite: bool = False) -> list[MockFiles]:
    """Write ``settings.n_mocks`` mocks (and randoms) into ``output_dir``.

    Parameters
    ----------
    settings : MockSettings
        The ``[mock]`` table.
    output_dir : str or Path
        Folder for the files ``{name}_{i:04d}.{fits|h5}``, ``..._randoms...`` and
        ``..._truth.json``.
    fiducial : corrpipe.cosmology.Cosmology, optional
        Analysis cosmology for the expected dilation (default: the ``planck2018`` preset).
    progress : bool
        Progress bars.
    echo : callable, optional
        Receives one line per written mock.
    overwrite : bool
        Replace existing files.

    Returns
    -------
    list of MockFiles
    """
    from corrpipe.cosmology import preset

    settings.validate()
    out = Path(output_dir)
    out.mkdir(parents=True, exist_ok=True)
    cosmo = true_cosmology(settings)
    fid = preset("planck2018") if fiducial is None else fiducial
    power = mock_power(settings, cosmo)
    ext = ".fits" if settings.format == "fits" else ".h5"
    written = []
    for i in range(settings.n_mocks):
        seed = settings.seed + i
        stem = f"{settings.name}_{i:04d}"
        base_meta = {"mock_kind": settings.kind, "seed": seed, "bias": settings.bias,
                     "nbar": settings.nbar, "box_redshift": settings.redshift}
        randoms_path = None
        if settings.geometry == "box":
            mixed = None
            if settings.interlopers:
                mixed = make_interloper_mix(settings, seed, cosmology=cosmo, power=power,
                                            progress=progress)
                box, pos = mixed.target, mixed.positions
            else:
                box = make_box_mock(settings, seed, cosmology=cosmo, power=power,
                                    progress=progress)
                pos = box.redshift_space_positions() if settings.rsd else box.positions
            z_eff = settings.redshift if settings.redshift > 0 else 1e-3
            dil = Dilation(alpha_par=settings.alpha_par, alpha_perp=settings.alpha_perp,
                           alpha_iso=settings.alpha_par ** (1 / 3) * settings.alpha_perp ** (2 / 3),
                           z_eff=z_eff)
            meta = dict(base_meta, box_size=box.box_size, los_axis=settings.los_axis,
                        alpha_par=dil.alpha_par, alpha_perp=dil.alpha_perp,
                        growth_rate=box.growth_rate)
            data_path = write_box_catalogue(out / (stem + ext), pos, meta=meta,
                                            overwrite=overwrite)
            n_obj = len(box) if mixed is None else len(pos)
        else:
            labels = interloper_truth = None
            if settings.interlopers:
                sky, labels, interloper_truth = make_survey_interloper_mix(
                    settings, seed, cosmology=cosmo, power=power, progress=progress)
            else:
                sky = make_survey_mock(settings, seed, cosmology=cosmo, power=power,
                                       progress=progress)
            if len(sky) == 0:
                raise InputError("the carved survey is empty: check footprint, redshift range "
                                 "and observer against the box")
            z_eff = effective_redshift(sky.z)
            dil = expected_dilation(cosmo, fid, z_eff)
            meta = dict(base_meta, **{k: v for k, v in sky.meta.items()}, z_eff=z_eff,
                        alpha_par=dil.alpha_par, alpha_perp=dil.alpha_perp,
                        alpha_iso=dil.alpha_iso)
            data_path = write_sky_catalogue(out / (stem + ext), sky.ra, sky.dec, sky.z,
                                            sky.weights, meta=meta, overwrite=overwrite,
                                            extra={"Z_COSMO": sky.z_cosmo} if labels is None
                                            else {"Z_COSMO": sky.z_cosmo,
                                                  "POPULATION": labels})
            n_obj = len(sky)
            if settings.randoms_factor > 0:
                n_r = int(round(settings.randoms_factor * len(sky)))
                ra, dec, zr = survey_randoms(footprint_of(settings), cosmo, settings.z_min,
                                             settings.z_max, n_r, nz=nz_of(settings),
                                             seed=np.random.default_rng([seed, 2]))
                randoms_path = write_sky_catalogue(out / (stem + "_randoms" + ext), ra, dec,
                                                   zr, meta={"seed": seed},
                                                   overwrite=overwrite)
        truth = {"settings": _jsonable(dataclasses.asdict(settings)), "seed": seed,
                 "n_objects": n_obj, "dilation": dil.as_dict(),
                 "true_cosmology": _jsonable(dataclasses.asdict(cosmo)),
                 "fiducial_cosmology": _jsonable(dataclasses.asdict(fid))}
        if settings.geometry == "box" and mixed is not None:
            truth["interlopers"] = mixed.truth()
        elif settings.geometry == "survey" and interloper_truth is not None:
            truth["interlopers"] = interloper_truth
        truth_path = out / (stem + "_truth.json")
        tmp = truth_path.with_suffix(".json.part")
        tmp.write_text(json.dumps(truth, indent=2))
        tmp.replace(truth_path)
        written.append(MockFiles(data=Path(data_path), randoms=randoms_path, truth=truth_path,
                                 n_objects=n_obj, dilation=dil))
        if echo is not None:
            echo(f"wrote {data_path} ({n_obj} objects; alpha_par = {dil.alpha_par:.4f}, "
                 f"alpha_perp = {dil.alpha_perp:.4f})")
    return written


def _jsonable(obj):
    if isinstance(obj, Mapping):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    return obj
