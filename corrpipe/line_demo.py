"""The default demo: an invented high-redshift emission-line survey analysed in redshift bins.

The *Marrowdeep Line-Emitter Survey* is fictional: a made-up wide-field slitless instrument
on a made-up telescope observed a mosaic of square fields (with gaps between them and a few
fields missing) and found Lyman-alpha emitters blindly, from one emission line each, between
z = 1.9 and 3.5. Each field's depth (its line-flux limit) falls in one of three classes, and
each class has its own redshift distribution: shallow fields lose emitters at high redshift,
deep fields keep them. A few per cent of the sample are low-redshift [O II] emitters whose
line was read as Lyman-alpha; they are drawn from their own clustered mock at their true
redshift and placed where that misreading puts them. The galaxies are a Zel'dovich mock with
redshift-space distortions, made in a *true* cosmology (Omega_m = 0.30, h = 0.69, constant
w = -0.85) that differs from the analysis' fiducial one (the ``planck2018`` preset).

:func:`write_line_demo_inputs` writes the catalogue (FITS; truth columns beside the observed
ones), the field table (ECSV), an invented low-redshift BAO file for the cosmology stage
(ECSV, made from the same true cosmology, labelled as invented), the truth (JSON) and a batch
config (TOML, two redshift bins and the expansion-history fit). ``corrpipe demo`` runs it.
Nothing here describes a real survey or instrument.
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

__all__ = ["SURVEY_NAME", "TRACER", "SCALES", "BINS", "N_DEPTH_CLASSES", "LineDemoInputs",
           "demo_fields",
           "class_selection", "interloper_fraction", "write_line_demo_inputs",
           "line_demo_config_text", "true_expansion", "true_selection_table"]

SURVEY_NAME = "Marrowdeep Line-Emitter Survey"
TRACER = "Lyman-alpha emitters"

Z_MIN, Z_MAX = 1.9, 3.5
#: The redshift bins of the batch (name, z_min, z_max).
BINS = (("low", 1.9, 2.6), ("high", 2.6, 3.5))
#: The box redshift of the target mock (its linear power, growth rate and BAO damping).
BOX_REDSHIFT = 2.6
BIAS = 2.8                      # Lyman-alpha emitters at the box redshift (invented)
INTERLOPER_BIAS = 1.2           # [O II] emitters at their true redshift (invented)
_OMEGA_B_H2 = 0.02242           # the fiducial preset's baryon density, kept in the truth
TRUE_H, TRUE_OMEGA_M, TRUE_W = 0.69, 0.30, -0.85

#: Survey sizes. "demo" is what ``corrpipe demo`` runs; "test" is the reduced survey of the
#: end-to-end test (same chain, too small for clear detections); "large" is for validation
#: runs on a bigger machine. ``ra``/``dec``: extent of the field mosaic (degrees);
#: ``side``/``pitch``: field side and centre spacing (degrees, along Dec; RA spacing is
#: pitch / cos(dec) so gaps stay even); ``peak``: mean density of the deepest class at its
#: peak, (h/Mpc)^3.
SCALES = {
    "test": dict(ra=(30.0, 42.0), dec=(10.0, 22.0), side=0.9, pitch=1.0, peak=2.0e-4,
                 n_mesh=192, interloper_mesh=96, size_factor=2.0, n_regions=40),
    "demo": dict(ra=(15.0, 65.0), dec=(-2.0, 40.0), side=0.9, pitch=1.0, peak=2.6e-4,
                 n_mesh=400, interloper_mesh=128, size_factor=2.0, n_regions=200),
    "large": dict(ra=(15.0, 60.0), dec=(0.0, 40.0), side=0.9, pitch=1.0, peak=2.0e-4,
                  n_mesh=448, interloper_mesh=160, size_factor=4.0, n_regions=150),
}

#: Per depth class: relative density and slope d ln n / dz of the class's n(z) (shallow,
#: medium, deep). Invented.
_CLASS_AMPLITUDE = (0.75, 0.9, 1.0)
_CLASS_SLOPE = (-0.9, -0.35, 0.2)
#: Number of depth classes of the field mosaic.
N_DEPTH_CLASSES = len(_CLASS_AMPLITUDE)
#: Interloper ([O II] read as Lyman-alpha) fraction of the sample against assigned redshift:
#: none below z = 2.55 ([O II] would have to lie at z < 0.16, too little volume for bright
#: emitters in a small footprint), rising to 5 % above z = 2.9. Invented.
_FRACTION_Z = (1.9, 2.55, 2.9, 3.5)
_FRACTION = (0.0, 0.0, 0.05, 0.05)


def interloper_fraction(z_assigned) -> np.ndarray:
    """Share of [O II] interlopers in the sample at assigned redshift(s)."""
    return np.interp(np.asarray(z_assigned, dtype=float), _FRACTION_Z, _FRACTION)


def class_selection(peak: float):
    """``nz_of_class(z, classes)``: the observed density n_k(z) of depth class k (targets and
    interlopers together), (h/Mpc)^3 in the true cosmology."""
    amp = np.asarray(_CLASS_AMPLITUDE) * peak
    slope = np.asarray(_CLASS_SLOPE)

    def nz_of_class(z, classes):
        k = np.asarray(classes)
        return amp[k] * np.exp(slope[k] * (np.asarray(z, dtype=float) - _pivot(slope[k])))

    return nz_of_class


def _pivot(slope):
    """Redshift where each class's n(z) reaches its amplitude: z_max for rising, z_min for
    falling densities (so the amplitude is the class's peak)."""
    return np.where(np.asarray(slope) > 0, Z_MAX, Z_MIN)


def true_selection_table(scale: str = "demo", n_bins: int = 320):
    """The true dN/dz of each depth class (targets and interlopers together) as the table a
    ``[randoms] redshifts = "table"`` run reads (columns depth_class, z_min, z_max, dndz;
    relative shapes: the class_selection density times the shell volume of the true
    cosmology in ``n_bins`` redshift bins).

    Returns
    -------
    astropy.table.Table
    """
    from astropy.table import Table

    true, _ = true_expansion()
    edges = np.linspace(Z_MIN, Z_MAX, n_bins + 1)
    centres = 0.5 * (edges[1:] + edges[:-1])
    shell = np.diff(true.comoving_distance(edges) ** 3)  # flat: volume per bin up to 4 pi / 3
    nz = class_selection(SCALES[scale]["peak"])
    rows = {"depth_class": [], "z_min": [], "z_max": [], "dndz": []}
    for k in range(N_DEPTH_CLASSES):
        rows["depth_class"] += [k] * n_bins
        rows["z_min"] += list(edges[:-1])
        rows["z_max"] += list(edges[1:])
        rows["dndz"] += list(nz(centres, np.full(n_bins, k)) * shell)
    return Table(rows)


def demo_fields(scale: str = "demo"):
    """The survey's field mosaic (fixed, seed-independent): square fields on a grid with even
    gaps, about 4 % of the fields missing, completeness 0.7-1 and three depth classes in
    patches of a few degrees.

    Returns
    -------
    corrpipe.survey.fields.FieldFootprint
    """
    from corrpipe.survey.fields import RECTANGLE, FieldFootprint

    p = SCALES[scale]
    rng = np.random.default_rng(20261202)
    side, pitch = p["side"], p["pitch"]
    ra_c, dec_c = [], []
    for dec in np.arange(p["dec"][0] + pitch / 2, p["dec"][1], pitch):
        step = pitch / np.cos(np.radians(dec))
        for ra in np.arange(p["ra"][0] + step / 2, p["ra"][1], step):
            ra_c.append(ra)
            dec_c.append(dec)
    ra_c, dec_c = np.array(ra_c), np.array(dec_c)
    keep = rng.random(ra_c.size) > 0.04
    ra_c, dec_c = ra_c[keep], dec_c[keep]
    n = ra_c.size
    # depth: a smooth pattern of ~6 deg patches (observing conditions, sky lines) plus scatter
    depth = (np.sin(np.radians(ra_c) * 11.0 + 0.7) + np.cos(np.radians(dec_c) * 13.0 + 0.3)
             + 0.6 * rng.standard_normal(n))
    classes = np.digitize(depth, np.quantile(depth, [1 / 3, 2 / 3]))
    completeness = rng.uniform(0.7, 1.0, n)
    return FieldFootprint(ra_c, dec_c, np.full(n, RECTANGLE), np.full(n, side),
                          np.full(n, side), np.zeros(n), np.zeros(n), completeness, classes,
                          source="demo field mosaic")


def true_expansion():
    """The demo's true cosmology (corrpipe.cosmology.Cosmology) and the fiducial one."""
    from corrpipe.cosmology import preset

    fid = preset("planck2018")
    true = dataclasses.replace(fid, h=TRUE_H, omega_m=TRUE_OMEGA_M,
                               omega_b=_OMEGA_B_H2 / TRUE_H**2, w0=TRUE_W)
    return true, fid


def _box_geometry(footprint, cosmology, z_lo: float, z_hi: float, margin: float = 60.0):
    """Observer position and cube side that hold the survey volume (footprint x shell)."""
    rng = np.random.default_rng(3)
    ra, dec, _ = footprint.sample_fields(20000, rng, by_completeness=False)
    ra, dec = np.radians(ra), np.radians(dec)
    u = np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=1)
    radii = [float(cosmology.comoving_distance(z)) for z in (z_lo, z_hi)]
    pts = np.concatenate([u * r for r in radii])
    lo, hi = pts.min(axis=0) - margin, pts.max(axis=0) + margin
    side = float(np.max(hi - lo))
    return (-lo).tolist(), side


@dataclass(frozen=True)
class LineDemoInputs:
    """Files and truth of a written line-survey demo.

    Attributes
    ----------
    folder : Path
        Where everything was written.
    data, fields, external, config, truth_file : Path
        Catalogue (FITS: RA, DEC, Z, WEIGHT and the truth columns Z_TRUE, POPULATION), field
        table (ECSV), invented external BAO file (ECSV), batch config (TOML), truth (JSON).
    config_text : str
        The config's text.
    true_cosmology, fiducial : corrpipe.cosmology.Cosmology
    n_galaxies, n_interlopers : int
    area_deg2 : float
        Effective area of the field mosaic (completeness-weighted).
    seconds : float
        Time taken to make the inputs.
    """

    folder: Path
    data: Path
    fields: Path
    external: Path
    config: Path
    config_text: str
    truth_file: Path
    true_cosmology: Any
    fiducial: Any
    n_galaxies: int
    n_interlopers: int
    n_fields: int
    area_deg2: float
    seconds: float
    meta: dict = field(default_factory=dict)

    def truth_at(self, z_eff: float):
        """Injected dilation (corrpipe.mocks.Dilation) at redshift ``z_eff``."""
        from corrpipe.mocks.dilation import expected_dilation

        return expected_dilation(self.true_cosmology, self.fiducial, float(z_eff))


def _target_mock(scale: str, seed: int, cosmology, footprint, nz_of_class, progress: bool,
                 rsd: bool = True):
    from corrpipe.mocks.field_survey import select_in_fields
    from corrpipe.mocks.make import make_box_mock
    from corrpipe.mocks.settings import MockSettings
    from corrpipe.mocks.survey import carve_survey

    p = SCALES[scale]
    observer, side = _box_geometry(footprint, cosmology, Z_MIN, Z_MAX)
    peak = p["peak"]
    settings = MockSettings(kind="zeldovich", geometry="survey", box_size=side,
                            n_mesh=p["n_mesh"], nbar=1.01 * peak, bias=BIAS,
                            redshift=BOX_REDSHIFT, precision="float32",
                            lagrangian_positions="cells")
    box = make_box_mock(settings, np.random.default_rng([seed, 0]), cosmology=cosmology,
                        progress=progress)
    carved = carve_survey(box, cosmology, footprint, Z_MIN, Z_MAX, observer=observer,
                          rsd=rsd, seed=np.random.default_rng([seed, 1]))
    nbar = box.nbar
    del box

    def target_nz(z, classes):
        return nz_of_class(z, classes) * (1.0 - interloper_fraction(z))

    mock = select_in_fields(carved, footprint, target_nz, nbar,
                            seed=np.random.default_rng([seed, 2]))
    return mock, {"box_size": side, "observer": observer, "n_mesh": p["n_mesh"],
                  "box_redshift": BOX_REDSHIFT, "bias": BIAS, "box_nbar": nbar, "rsd": rsd}


def _interloper_mock(scale: str, seed: int, cosmology, footprint, nz_of_class,
                     progress: bool):
    """[O II] emitters at their true redshift, thinned so that after the misreading they make
    :func:`interloper_fraction` of the sample in every depth class, then moved to the assigned
    redshift."""
    from corrpipe.mocks.field_survey import select_in_fields
    from corrpipe.mocks.make import make_box_mock
    from corrpipe.mocks.settings import MockSettings
    from corrpipe.mocks.survey import carve_survey
    from corrpipe.theory.interlopers import (assigned_redshift, line_mapping, rest_wavelength,
                                             true_redshift)

    lam_t, lam_i = rest_wavelength("Lya"), rest_wavelength("OII")
    z_a_lo = float(_FRACTION_Z[int(np.flatnonzero(np.asarray(_FRACTION) > 0)[0]) - 1])
    zi_lo, zi_hi = (float(v) for v in true_redshift([z_a_lo, Z_MAX], lam_i, lam_t))

    def nz_true(z_true, classes):
        # number conservation: the mapping stretches volumes by gamma_perp^2 gamma_par
        z_a = np.clip(assigned_redshift(z_true, lam_i, lam_t), Z_MIN, Z_MAX)
        m = line_mapping(cosmology, "Lya", "OII", z_a)
        return interloper_fraction(z_a) * nz_of_class(z_a, classes) * m.gamma_perp**2 \
            * m.gamma_par

    grid = np.linspace(zi_lo, zi_hi, 256)
    peak = float(max(np.max(nz_true(grid, np.full(grid.size, k))) for k in range(3)))
    observer, side = _box_geometry(footprint, cosmology, zi_lo, zi_hi)
    z_box = float(true_redshift(0.5 * (z_a_lo + Z_MAX), lam_i, lam_t))
    n_mesh = SCALES[scale]["interloper_mesh"]
    side = max(side, np.pi * n_mesh / 0.45)  # keep cells fine enough for the Nyquist check
    settings = MockSettings(kind="zeldovich", geometry="survey", box_size=side,
                            n_mesh=n_mesh, nbar=1.01 * peak, bias=INTERLOPER_BIAS,
                            redshift=z_box, precision="float32",
                            lagrangian_positions="cells")
    box = make_box_mock(settings, np.random.default_rng([seed, 100]), cosmology=cosmology,
                        progress=progress)
    carved = carve_survey(box, cosmology, footprint, zi_lo, zi_hi, observer=observer, rsd=True,
                          seed=np.random.default_rng([seed, 101]))
    nbar = box.nbar
    del box
    mock = select_in_fields(carved, footprint, nz_true, nbar,
                            seed=np.random.default_rng([seed, 102]))
    z_a = assigned_redshift(mock.z, lam_i, lam_t)
    keep = (z_a >= Z_MIN) & (z_a < Z_MAX)
    mock = dataclasses.replace(mock, ra=mock.ra[keep], dec=mock.dec[keep], z=z_a[keep],
                               z_cosmo=mock.z_cosmo[keep], weights=mock.weights[keep])
    return mock, {"line": "OII", "true_redshift_range": [zi_lo, zi_hi], "box_size": side,
                  "n_mesh": n_mesh, "box_redshift": z_box, "bias": INTERLOPER_BIAS,
                  "box_nbar": nbar}


def _external_file(path: Path, cosmology, seed: int) -> list[dict]:
    """Invented low-redshift BAO distances (ECSV) from the true cosmology with Gaussian noise."""
    from astropy.table import Table

    rows = [("invented-lowz-A", 0.38, "DV_over_rd", 0.012),
            ("invented-lowz-B", 0.61, "DM_over_rd", 0.013),
            ("invented-lowz-B", 0.61, "DH_over_rd", 0.025),
            ("invented-lowz-C", 0.92, "DM_over_rd", 0.014),
            ("invented-lowz-C", 0.92, "DH_over_rd", 0.024)]
    rng = np.random.default_rng([seed, 300])
    out = []
    for label, z, qty, rel in rows:
        true = float(cosmology.distance_ratios(z)[qty])
        sigma = rel * true
        out.append({"label": label, "z": z, "quantity": qty, "truth": true,
                    "value": true + sigma * rng.standard_normal(), "error": sigma})
    table = Table(rows=[(r["label"], r["z"], r["quantity"], r["value"], r["error"])
                        for r in out], names=("label", "z", "quantity", "value", "error"))
    table.meta["comments"] = [
        "INVENTED low-redshift BAO distances for the corrpipe demo: drawn from the demo's",
        "true cosmology with the stated Gaussian errors; not a measurement of any survey."]
    tmp = path.with_suffix(".tmp.ecsv")
    table.write(tmp, format="ascii.ecsv", overwrite=True)
    tmp.replace(path)
    return out


def line_demo_config_text(scale: str, data_name: str, fields_name: str, external_name: str,
                          seed: int = 7, output: str = "results", bins=BINS,
                          expansion: bool = True) -> str:
    """Batch config (TOML) of the line-survey demo, paths relative to the config file
    (``bins``: a subset of :data:`BINS` to analyse; ``expansion``: the [expansion] stage)."""
    p = SCALES[scale]
    bins = "\n".join(f"[analyses.{name}]\ncatalogue = {{ z_min = {lo:g}, z_max = {hi:g} }}"
                     + ("\nfit = { target_line = \"Lya\", interloper_line = \"OII\", "
                        "interloper_fraction = 0.05, interloper_fraction_width = 0.03, "
                        f"interloper_bias = {INTERLOPER_BIAS:g} }}" if hi > 2.7 else "") + "\n"
                     for name, lo, hi in bins)
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
z_min = {Z_MIN:g}
z_max = {Z_MAX:g}
name = "{TRACER}"

[footprint]
kind = "fields"
fields_file = "{fields_name}"
field_size_unit = "deg"

[randoms]
size_factor = {p["size_factor"]:g}
n_sets = {int(p["size_factor"])}               # split-random RR (Keihanen et al. 2019)
redshifts = "shuffle_by_class"   # each field's depth class has its own n(z)

[weights]
fkp = true
fkp_p0 = 5000.0

[counts]
s_min = 0.0
s_max = 150.0                    # 10 Mpc/h bins: the fit uses 50-150 (fewer bins, better Hartlap)
n_s = 15
n_mu = 40

[covariance]
kind = "jackknife"
regions = "fields"
n_regions = {p["n_regions"]}
jackknife_weighting = "mohammad_percival"

[fit]
analysis = "anisotropic"
s_min = 50.0
s_max = 150.0
damping_model = "zeldovich"      # Sigma_perp, Sigma_par from D(z_eff) sigma8 at each bin

{bins}
[expansion]
enabled = {str(bool(expansion)).lower()}
model = "wcdm"
external = ["{external_name}"]   # INVENTED low-z distances from the demo's true cosmology
"""


def write_line_demo_inputs(out_dir, seed: int = 7, scale: str = "demo", *,
                           progress: bool = True, rsd: bool = True,
                           interlopers: bool = True) -> LineDemoInputs:
    """Make the line-survey demo and write its inputs (see the module docstring).

    Parameters
    ----------
    out_dir : str or Path
        Folder to write into (created).
    seed : int
        Seed of the mock (the same seed gives the same files).
    scale : {"test", "demo", "large"}
        Survey size (:data:`SCALES`).
    progress : bool
        Progress bars while drawing the mocks.
    rsd, interlopers : bool
        Diagnostic switches (``scripts/separate_demo_bias.py``): False draws the targets
        without redshift-space distortions, or leaves the interlopers out (the targets are
        still thinned to make room for them, so they are the same galaxies).

    Returns
    -------
    LineDemoInputs
    """
    from astropy.table import Table

    from corrpipe.mocks.survey import write_sky_catalogue

    if scale not in SCALES:
        raise InputError(f"unknown demo size {scale!r}; choose one of {sorted(SCALES)}")
    start = time.perf_counter()
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    true, fid = true_expansion()
    footprint = demo_fields(scale)
    nz_of_class = class_selection(SCALES[scale]["peak"])
    target, target_meta = _target_mock(scale, seed, true, footprint, nz_of_class, progress,
                                       rsd=rsd)
    if interlopers:
        inter, inter_meta = _interloper_mock(scale, seed, true, footprint, nz_of_class,
                                             progress)
    else:
        inter = dataclasses.replace(target, ra=target.ra[:0], dec=target.dec[:0],
                                    z=target.z[:0], z_cosmo=target.z_cosmo[:0],
                                    weights=target.weights[:0])
        inter_meta = {"left_out": True}
    n_t, n_i = target.ra.size, inter.ra.size
    if n_t == 0:
        raise InputError("the demo survey came out empty; this is a bug in the demo settings")
    cat = {k: np.concatenate([getattr(target, k), getattr(inter, k)])
           for k in ("ra", "dec", "z", "z_cosmo", "weights")}
    population = np.concatenate([np.zeros(n_t, np.int16), np.ones(n_i, np.int16)])
    name = "marrowdeep_lae"
    data_path = write_sky_catalogue(folder / f"{name}.fits", cat["ra"], cat["dec"], cat["z"],
                                    cat["weights"],
                                    meta={"survey": SURVEY_NAME, "seed": int(seed),
                                          "scale": scale},
                                    overwrite=True,
                                    extra={"Z_TRUE": cat["z_cosmo"], "POPULATION": population})
    fields_path = folder / "marrowdeep_fields.ecsv"
    ftab = Table({"ra": footprint.ra, "dec": footprint.dec,
                  "shape": np.full(footprint.n_fields, "square"),
                  "side": footprint.side_a, "completeness": footprint.completeness_values,
                  "depth_class": footprint.depth_class})
    ftab.meta["comments"] = [f"{SURVEY_NAME} (fictional) field mosaic; sides in degrees"]
    tmp = fields_path.with_suffix(".tmp.ecsv")
    ftab.write(tmp, format="ascii.ecsv", overwrite=True)
    tmp.replace(fields_path)
    external_path = folder / "invented_lowz_bao.ecsv"
    external = _external_file(external_path, true, seed)
    text = line_demo_config_text(scale, data_path.name, fields_path.name, external_path.name,
                                 seed=seed)
    config_path = folder / "demo.toml"
    config_path.write_text(text)
    # realised interloper fraction per bin (truth for the fit's interloper_fraction)
    fractions = {}
    for b, lo, hi in BINS:
        inside = (cat["z"] >= lo) & (cat["z"] < hi)
        fractions[b] = float(np.mean(population[inside] == 1)) if inside.any() else 0.0
    area = float(np.sum(footprint.owned_areas_sr() * footprint.completeness_values)
                 * (180 / np.pi) ** 2)
    truth_doc = {"survey": SURVEY_NAME, "tracer": TRACER, "fictional": True, "scale": scale,
                 "seed": int(seed), "n_galaxies": int(n_t + n_i), "n_interlopers": int(n_i),
                 "n_fields": int(footprint.n_fields), "effective_area_deg2": area,
                 "interloper_fraction_per_bin": fractions,
                 "true_cosmology": dataclasses.asdict(true),
                 "fiducial_cosmology": dataclasses.asdict(fid),
                 "true_expansion": {"omega_m": TRUE_OMEGA_M, "w": TRUE_W,
                                    "h_rd": TRUE_H * float(true.sound_horizon())},
                 "target_mock": target_meta, "interloper_mock": inter_meta,
                 "external_invented": external}
    truth_path = folder / "truth.json"
    truth_path.write_text(json.dumps(truth_doc, indent=2, default=float))
    return LineDemoInputs(folder=folder, data=Path(data_path), fields=fields_path,
                          external=external_path, config=config_path, config_text=text,
                          truth_file=truth_path, true_cosmology=true, fiducial=fid,
                          n_galaxies=int(n_t + n_i), n_interlopers=int(n_i),
                          n_fields=int(footprint.n_fields), area_deg2=area,
                          seconds=time.perf_counter() - start,
                          meta={"fractions": fractions})


def _row(name: str, truth: float, s: dict) -> tuple[str, bool]:
    sigma = 0.5 * (float(s["p84"]) - float(s["p16"]))
    pull = (float(s["median"]) - truth) / sigma if sigma > 0 else float("nan")
    lo, hi = s.get("p025"), s.get("p975")
    inside = bool(lo is not None and float(lo) <= truth <= float(hi))
    return (f"{name:>20} {truth:9.4f} {float(s['median']):10.4f} "
            f"[{float(s['p16']):.4f}, {float(s['p84']):.4f}] {pull:+7.2f}σ"
            f"{'' if inside else '   outside 95%'}"), inside


def bin_report(inputs: LineDemoInputs, name: str, summary: dict) -> tuple[str, dict]:
    """Truth against recovered for one redshift bin (its ``summary.json``).

    Returns
    -------
    (str, dict)
        The table, and per quantity ``{"truth", "median", "error", "pull", "in_95", "in_68"}`` plus
        ``detection_sigma`` and ``prior_limited`` (any alpha flagged).
    """
    truth = inputs.truth_at(summary["z_eff"])
    diag = summary.get("diagnostics", {})
    det = diag.get("bao_detection", {}).get("significance_sigma", float("nan"))
    limited = [k for k, v in diag.get("prior_edges", {}).items() if v.get("prior_limited")]
    lines = [f"bin '{name}' at z_eff = {summary['z_eff']:.3f}: BAO detected at {det:.1f} sigma"
             + (f"; prior-limited: {', '.join(limited)}" if limited else ""),
             f"{'quantity':>20} {'truth':>9} {'recovered':>10} {'68% interval':>19} "
             f"{'offset':>8}"]
    out = {"detection_sigma": float(det), "prior_limited": bool(limited)}
    rows = [(summary["summary"], k, getattr(truth, a)) for k, a in
            (("alpha_par", "alpha_par"), ("alpha_perp", "alpha_perp"), ("alpha", "alpha_iso"))]
    rows += [(summary.get("distances", {}), k, getattr(truth, k))
             for k in ("DM_over_rd", "DH_over_rd", "DV_over_rd")]
    frac = inputs.meta.get("fractions", {}).get(name)
    if "interloper_fraction" in summary["summary"] and frac is not None:
        rows.append((summary["summary"], "interloper_fraction", frac))
    for table, key, value in rows:
        if key not in table:
            continue
        text, inside = _row(key, float(value), table[key])
        lines.append(text)
        s = table[key]
        sigma = 0.5 * (float(s["p84"]) - float(s["p16"]))
        out[key] = {"truth": float(value), "median": float(s["median"]), "error": sigma,
                    "pull": (float(s["median"]) - float(value)) / sigma if sigma > 0
                    else float("nan"), "in_95": inside,
                    "in_68": bool(float(s["p16"]) <= float(value) <= float(s["p84"]))}
    return "\n".join(lines), out


def expansion_report(inputs: LineDemoInputs, constraints: dict) -> tuple[str, dict]:
    """Truth against recovered for the expansion-history fit (``constraints.json``)."""
    truth = json.loads(inputs.truth_file.read_text())["true_expansion"]
    names = {"Omega_m": truth["omega_m"], "h_rd": truth["h_rd"], "w": truth["w"]}
    lines = [f"expansion history ({constraints['model']}) from the bins and the invented "
             f"low-redshift file: chi2 = {constraints['chi2']:.1f} / {constraints['dof']} dof",
             f"{'parameter':>20} {'truth':>9} {'recovered':>10} {'68% interval':>19} "
             f"{'offset':>8}"]
    out = {}
    for key, value in names.items():
        c = constraints["constraints"].get(key)
        if c is None:
            continue
        s = {"median": c["median"], "p16": c["interval_68"][0], "p84": c["interval_68"][1],
             "p025": c["interval_95"][0], "p975": c["interval_95"][1]}
        text, inside = _row(key, float(value), s)
        lines.append(text + ("   (prior-bounded)" if c.get("prior_bounded") else ""))
        sigma = 0.5 * (s["p84"] - s["p16"])
        out[key] = {"truth": float(value), "median": float(c["median"]), "error": sigma,
                    "pull": (float(c["median"]) - float(value)) / sigma, "in_95": inside,
                    "in_68": bool(s["p16"] <= float(value) <= s["p84"]),
                    "prior_bounded": bool(c.get("prior_bounded"))}
    return "\n".join(lines), out
