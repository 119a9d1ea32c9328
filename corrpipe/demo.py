"""The built-in demo survey: an invented redshift survey with a known, injected dilation.

The *Halcyon Fen Wide Redshift Survey* is fictional: a made-up 4-metre spectroscopic telescope
at a made-up site observed "ember galaxies" (an invented tracer: bright, red, strongly
clustered, bias about 1.9) over two RA/Dec fields of about 1150 deg^2 together (about 60k galaxies), between
z = 0.2 and 0.65, with a number density that peaks near z = 0.45. The catalogue is a
Zel'dovich mock made in a *true* cosmology (Omega_m = 0.27, h = 0.70) that differs from the
analysis' fiducial one (the ``planck2018`` preset), so the pipeline should recover
alpha_par ~ 0.97 and alpha_perp ~ 0.96 rather than 1. Nothing here describes a real survey.

:func:`write_demo_inputs` writes the data and random catalogues (FITS), the truth (JSON) and
a pipeline config (TOML) into a folder; ``corrpipe demo`` runs the pipeline on them.
"""

from __future__ import annotations

import dataclasses
import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from corrpipe.errors import InputError
from corrpipe.mocks.dilation import Dilation, expected_dilation
from corrpipe.mocks.make import (effective_redshift, footprint_of, make_survey_mock, nz_of,
                                 true_cosmology)
from corrpipe.mocks.settings import MockSettings
from corrpipe.mocks.survey import survey_randoms, write_sky_catalogue

__all__ = ["SURVEY_NAME", "TRACER", "SCALES", "DemoInputs", "demo_settings",
           "write_demo_inputs", "demo_config_text", "truth_vs_recovered"]

SURVEY_NAME = "Halcyon Fen Wide Redshift Survey"
TRACER = "ember galaxies"

_OMEGA_B_H2 = 0.02242  # keep the baryon density of the fiducial preset in the true cosmology
_TRUE_H, _TRUE_OMEGA_M = 0.70, 0.27

#: Sizes of the demo. "demo" is what ``corrpipe demo`` runs (about 60k galaxies); "test" is a
#: smaller survey for end-to-end tests (about 34k); "tiny" only checks the plumbing (too
#: small for a BAO detection); "large" is a bigger one for serious validation runs.
SCALES = {
    "tiny": dict(box_size=1000.0, n_mesh=128, footprint=((20.0, 50.0, 10.0, 30.0),),
                 z_min=0.15, z_max=0.33, peak=1.6e-4),
    "test": dict(box_size=1450.0, n_mesh=192, footprint=((20.0, 56.0, 10.0, 38.0),),
                 z_min=0.25, z_max=0.55, peak=1.6e-4),
    "demo": dict(box_size=1760.0, n_mesh=256, footprint=((18.0, 58.0, 10.0, 36.0),
                                                         (62.0, 76.0, 14.0, 30.0)),
                 z_min=0.2, z_max=0.65, peak=1.6e-4),
    "large": dict(box_size=1880.0, n_mesh=384, footprint=((10.0, 80.0, 5.0, 50.0),),
                  z_min=0.2, z_max=0.7, peak=2.0e-4),
}


def _nz_table(z_min: float, z_max: float, peak: float):
    """The ember-galaxy n(z): a smooth bump peaking at z = 0.45, (h/Mpc)^3."""
    z = np.linspace(z_min, z_max, 19)
    n = peak * (0.35 + 0.65 * np.exp(-0.5 * ((z - 0.45) / 0.11) ** 2))
    return tuple(float(v) for v in z), tuple(float(v) for v in n)


def demo_settings(scale: str = "demo", seed: int = 7, *, fiducial_truth: bool = False,
                  kind: str = "zeldovich") -> MockSettings:
    """The mock definition of the demo survey at one of :data:`SCALES`.

    With ``fiducial_truth`` the mock is made in the analysis' fiducial cosmology instead of
    the demo's true one, so the expected dilation is exactly 1 (a null test for validation).
    ``kind = "lognormal"`` draws the same survey from a lognormal field (no bulk-flow damping
    or mode coupling of the BAO; for validation).
    """
    if scale not in SCALES:
        raise InputError(f"unknown demo scale {scale!r}; choose one of {sorted(SCALES)}")
    p = SCALES[scale]
    z_nodes, n_nodes = _nz_table(p["z_min"], p["z_max"], p["peak"])
    truth = {} if fiducial_truth else dict(true_h=_TRUE_H, true_omega_m=_TRUE_OMEGA_M,
                                           true_omega_b=_OMEGA_B_H2 / _TRUE_H**2)
    return MockSettings(kind=kind, geometry="survey", seed=int(seed),
                        box_size=p["box_size"], n_mesh=p["n_mesh"], nbar=p["peak"],
                        bias=1.9, redshift=0.45, **truth, observer=(0.0, 0.0, 0.0),
                        z_min=p["z_min"], z_max=p["z_max"], footprint=p["footprint"],
                        nz_redshifts=z_nodes, nz_densities=n_nodes, randoms_factor=8.0,
                        format="fits", name="halcyon_fen_wide")


@dataclass(frozen=True)
class DemoInputs:
    """Files and truth of a written demo survey.

    Attributes
    ----------
    folder : Path
        Where everything was written.
    data, randoms : Path
        Data and random catalogues (FITS; columns RA, DEC, Z, WEIGHT).
    config : Path
        Pipeline config (TOML) reading them; its text is ``config_text``.
    truth_file : Path
        JSON with the truth, the survey description and the mock settings.
    truth : Dilation
        Injected dilation at the sample's mean redshift (:meth:`truth_at` gives it at the
        pipeline's z_eff).
    true_cosmology, fiducial : corrpipe.cosmology.Cosmology
        The cosmology the mock was made in and the analysis fiducial.
    n_galaxies, n_randoms : int
        Catalogue sizes.
    area_deg2 : float
        Footprint area.
    seconds : float
        Time taken to make the inputs.
    """

    folder: Path
    data: Path
    randoms: Path
    config: Path
    config_text: str
    truth_file: Path
    truth: Dilation
    n_galaxies: int
    n_randoms: int
    area_deg2: float
    seconds: float
    true_cosmology: Any
    fiducial: Any
    meta: dict = field(default_factory=dict)

    def truth_at(self, z_eff: float) -> Dilation:
        """Injected dilation at redshift ``z_eff`` (e.g. the z_eff the pipeline reports)."""
        return expected_dilation(self.true_cosmology, self.fiducial, float(z_eff))


def demo_config_text(settings: MockSettings, data_name: str, randoms_name: str,
                     output: str = "results", seed: int = 7) -> str:
    """Pipeline config (TOML) for the demo catalogues, paths relative to the config file."""
    boxes = ", ".join("[" + ", ".join(f"{v:g}" for v in b) + "]" for b in settings.footprint)
    return f"""# {SURVEY_NAME}: {TRACER}, a demo survey made by corrpipe (fictional).
# Truth: see truth.json beside this file. Fiducial cosmology: planck2018 preset.

[run]
output = "{output}"
seed = {int(seed)}

[cosmology]
preset = "planck2018"

[catalogue]
path = "{data_name}"
kind = "sky"
weight_columns = ["WEIGHT"]
z_min = {settings.z_min:g}
z_max = {settings.z_max:g}
name = "ember galaxies"

[footprint]
kind = "boxes"
boxes = [{boxes}]

[randoms]
file = "{randoms_name}"
n_sets = 8                  # split-random RR (Keihanen et al. 2019): 8x cheaper RR

[weights]
fkp = true
fkp_p0 = 10000.0

[counts]
s_min = 0.0
s_max = 160.0
n_s = 20
n_mu = 40

[covariance]
kind = "jackknife"
regions = "kmeans"
n_regions = 100
jackknife_weighting = "mohammad_percival"   # calibrated against mocks (scripts/calibrate_jackknife.py)

[fit]
analysis = "anisotropic"
s_min = 50.0
s_max = 150.0
damping_model = "fixed"   # 10 / 6 Mpc/h (z ~ 0.5), as its figures were measured
"""


def write_demo_inputs(out_dir, seed: int = 7, scale: str = "demo", *,
                      progress: bool = True, overwrite: bool = True,
                      fiducial_truth: bool = False, kind: str = "zeldovich") -> DemoInputs:
    """Make the demo survey and write its catalogues, truth and pipeline config.

    Parameters
    ----------
    out_dir : str or Path
        Folder to write into (created).
    seed : int
        Seed of the mock (the same seed gives the same files).
    scale : {"test", "demo", "large"}
        Survey size (:data:`SCALES`).
    progress : bool
        Progress bars while drawing the mock.
    overwrite : bool
        Replace files from an earlier call.
    fiducial_truth : bool
        Make the mock in the fiducial cosmology (truth alpha = 1), see :func:`demo_settings`.
    kind : {"zeldovich", "lognormal"}
        Mock generator, see :func:`demo_settings`.

    Returns
    -------
    DemoInputs
    """
    from corrpipe.cosmology import preset

    start = time.perf_counter()
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    settings = demo_settings(scale, seed, fiducial_truth=fiducial_truth, kind=kind)
    settings.validate()
    cosmo = true_cosmology(settings)
    fid = preset("planck2018")
    sky = make_survey_mock(settings, int(seed), cosmology=cosmo, progress=progress)
    if len(sky) == 0:
        raise InputError("the demo survey came out empty; this is a bug in the demo settings")
    z_eff = effective_redshift(sky.z)
    truth = expected_dilation(cosmo, fid, z_eff)
    footprint = footprint_of(settings)
    n_rand = int(round(settings.randoms_factor * len(sky)))
    ra, dec, zr = survey_randoms(footprint, cosmo, settings.z_min, settings.z_max, n_rand,
                                 nz=nz_of(settings), seed=np.random.default_rng([seed, 2]))
    meta = {"survey": SURVEY_NAME, "tracer": TRACER, "seed": int(seed), "scale": scale,
            "z_eff": z_eff, "alpha_par": truth.alpha_par, "alpha_perp": truth.alpha_perp,
            "alpha_iso": truth.alpha_iso}
    data_path = write_sky_catalogue(folder / f"{settings.name}.fits", sky.ra, sky.dec, sky.z,
                                    sky.weights, meta=meta, overwrite=overwrite,
                                    extra={"Z_COSMO": sky.z_cosmo})
    randoms_path = write_sky_catalogue(folder / f"{settings.name}_randoms.fits", ra, dec, zr,
                                       meta={"survey": SURVEY_NAME, "seed": int(seed)},
                                       overwrite=overwrite)
    text = demo_config_text(settings, data_path.name, randoms_path.name, seed=seed)
    config_path = folder / "demo.toml"
    config_path.write_text(text)
    truth_doc = {"survey": SURVEY_NAME, "tracer": TRACER, "fictional": True,
                 "scale": scale, "seed": int(seed), "fiducial_truth": bool(fiducial_truth),
                 "n_galaxies": len(sky),
                 "n_randoms": n_rand, "area_deg2": footprint.area_deg2(),
                 "truth": truth.as_dict(),
                 "true_cosmology": dataclasses.asdict(cosmo),
                 "fiducial_cosmology": dataclasses.asdict(fid),
                 "mock": {k: (list(v) if isinstance(v, tuple) else v)
                          for k, v in dataclasses.asdict(settings).items()}}
    truth_path = folder / "truth.json"
    truth_path.write_text(json.dumps(truth_doc, indent=2, default=float))
    return DemoInputs(folder=folder, data=Path(data_path), randoms=Path(randoms_path),
                      config=config_path, config_text=text, truth_file=truth_path,
                      truth=truth, n_galaxies=len(sky), n_randoms=n_rand,
                      area_deg2=footprint.area_deg2(),
                      seconds=time.perf_counter() - start, true_cosmology=cosmo,
                      fiducial=fid, meta=sky.meta)


def truth_vs_recovered(truth: Dilation, summary: dict, distances: dict | None = None) -> str:
    """Table of injected vs recovered dilations, with the offset in units of the error.

    Parameters
    ----------
    truth : Dilation
        What was injected.
    summary : dict
        The ``"summary"`` mapping of ``summary.json``: per parameter ``median``, ``p16``,
        ``p84``.
    distances : dict, optional
        The ``"distances"`` mapping of ``summary.json`` (D_M/r_d, D_H/r_d, D_V/r_d, same
        keys); rows are added for those the truth knows.

    Returns
    -------
    str
        One line per quantity found (alpha_par, alpha_perp, alpha, then distances).
    """
    lines = [f"{SURVEY_NAME} (fictional), z_eff = {truth.z_eff:.3f}",
             f"{'parameter':>11} {'truth':>8} {'recovered':>10} {'68% interval':>19} "
             f"{'offset':>8}"]
    rows = [(summary, "alpha_par", truth.alpha_par), (summary, "alpha_perp", truth.alpha_perp),
            (summary, "alpha", truth.alpha_iso)]
    rows += [(distances or {}, key, getattr(truth, key))
             for key in ("DM_over_rd", "DH_over_rd", "DV_over_rd")]
    for table, name, value in rows:
        if name not in table or not np.isfinite(value):
            continue
        s = table[name]
        sigma = 0.5 * (float(s["p84"]) - float(s["p16"]))
        pull = (float(s["median"]) - value) / sigma if sigma > 0 else float("nan")
        lines.append(f"{name:>11} {value:8.4f} {float(s['median']):10.4f} "
                     f"[{float(s['p16']):.4f}, {float(s['p84']):.4f}] {pull:+7.2f}σ")
    return "\n".join(lines)
