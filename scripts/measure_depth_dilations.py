#!/usr/bin/env python
"""Clustered mocks with a depth that varies across fields: multipole bias and BAO dilations.

The clustered companion of ``measure_depth_selection.py``. Zel'dovich box mocks (made in the
fiducial cosmology, so the expected dilation is 1 up to the small mode-coupling shift) are
carved into an invented pointed survey of 24 x 18 square fields (1.0 deg sides, 1.5 deg apart,
RA 20-56, Dec 10-37) with three depth classes in RA bands whose n(z) peak at z = 0.33, 0.40
and 0.47 (:func:`corrpipe.mocks.field_survey.select_in_fields`). Each mock is measured with
Landy–Szalay (Landy & Szalay 1993) multipoles xi_0, xi_2 against three random catalogues:

* ``global`` - redshifts shuffled over the whole survey (ignores the depth variation),
* ``class``  - redshifts shuffled within each depth class (``shuffle_by_class``),
* ``true``   - randoms drawn from the true selection (``field_selection_randoms``).

Printed: (a) the mean over mocks of xi_0, xi_2 averaged over 60-150 Mpc/h with its error of
the mean, per variant; (b) per-mock paired differences class - true and global - true over the
same range, mean +- error of the mean and the chi^2 of the per-bin mean difference against 0;
(c) BAO dilations: the best fit (corrpipe.fit.run.best_fit, the pipeline's default anisotropic
model and 50-150 Mpc/h range) of each mock for each variant, with the diagonal of the mock
scatter of the ``true`` multipoles as covariance (too few mocks for a full scatter matrix), and
the paired dilation differences in units of the per-mock error (the scatter of the ``true``
fits over mocks).

Usage::

    PYTHONPATH=. python scripts/measure_depth_dilations.py --mocks 2   # plumbing (~1 min)
    PYTHONPATH=. python scripts/measure_depth_dilations.py --mocks 20  # ~2 min on 2 cores
    PYTHONPATH=. python scripts/measure_depth_dilations.py --mocks 20 --n-mesh 160 --density 6e-4 \
        --field-side 1.2 --random-factor 4                                # ~8 min
    PYTHONPATH=. python scripts/measure_depth_dilations.py --mocks 20 --uniform-depth  # null case
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from measure_depth_selection import multipoles_of  # the one LS multipole helper

Z_MIN, Z_MAX = 0.25, 0.55
CLASS_MEANS = (0.33, 0.40, 0.47)
VARIANTS = ("global", "class", "true")
DILATIONS = ("alpha_par", "alpha_perp", "alpha")


def survey(side: float = 1.0):
    """The invented field pattern with three depth bands in RA (8 columns each)."""
    from corrpipe.survey.fields import RECTANGLE, FieldFootprint

    rng = np.random.default_rng(5)
    i, j = np.divmod(np.arange(24 * 18), 18)
    n = i.size
    return FieldFootprint(20.75 + 1.5 * i, 10.75 + 1.5 * j, np.full(n, RECTANGLE),
                          np.full(n, side), np.full(n, side), np.zeros(n), None,
                          rng.uniform(0.7, 1.0, n), i // 8)


def class_selection(peak: float, uniform: bool = False):
    """``nz_of_class(z, classes)``: each class's target density n_k(z), (h/Mpc)^3 (with
    ``uniform`` every class has the middle class's n(z))."""
    centres = np.full(3, CLASS_MEANS[1]) if uniform else np.asarray(CLASS_MEANS)

    def nz_of_class(z, classes):
        means = centres[np.asarray(classes)]
        return peak * np.exp(-0.5 * ((np.asarray(z, float) - means) / 0.06) ** 2)

    return nz_of_class


def one_mock(m, args, settings, cosmo, power, fp, binning, nz_of_class):
    """Multipoles of mock ``m`` against the three random catalogues."""
    from corrpipe.mocks.field_survey import field_selection_randoms, select_in_fields
    from corrpipe.mocks.make import make_box_mock
    from corrpipe.mocks.survey import carve_survey
    from corrpipe.survey.randoms import make_local_randoms, make_randoms
    from corrpipe.survey.selection import ShuffledByClass

    box = make_box_mock(settings, 100 + m, cosmology=cosmo, power=power, progress=False)
    carved = carve_survey(box, cosmo, fp, Z_MIN, Z_MAX, rsd=True, seed=200 + m)
    mock = select_in_fields(carved, fp, nz_of_class, box.nbar, seed=300 + m)
    data = (mock.ra, mock.dec, mock.z)
    n_rand = int(args.random_factor * mock.ra.size)
    g = make_randoms(fp, mock.z, n_randoms=n_rand, seed=400 + m, progress=False)
    cls = fp.depth_class_of(mock.ra, mock.dec)
    c, _ = make_local_randoms(fp, ShuffledByClass(mock.z, np.ones(mock.z.size), cls, 3), n_rand,
                              class_counts=np.bincount(cls[cls >= 0], minlength=3),
                              seed=500 + m, progress=False)
    t = field_selection_randoms(fp, cosmo, Z_MIN, Z_MAX, n_rand, nz_of_class, seed=600 + m)
    out = {"global": multipoles_of(data, (g.ra, g.dec, g.z), binning, cosmo),
           "class": multipoles_of(data, (c.ra, c.dec, c.z), binning, cosmo),
           "true": multipoles_of(data, t, binning, cosmo)}
    return out, mock.ra.size, n_rand, float(np.mean(mock.z))


def fit_dilations(s, vectors, sigma, z_eff, cosmo):
    """Best-fit alpha_par, alpha_perp and alpha = alpha_par^(1/3) alpha_perp^(2/3) (Xu et al.
    2013) of each multipole vector (diagonal covariance)."""
    from corrpipe.fit import FitSettings
    from corrpipe.fit.run import best_fit, build_likelihood, build_linear_power

    settings = FitSettings()
    lp = build_linear_power(cosmo, z_eff, settings)
    cov = np.diag(sigma**2)
    out = []
    for v in vectors:
        like = build_likelihood(s, v, cov, (0, 2), cosmology=cosmo, z_eff=z_eff,
                                settings=settings, linear_power=lp)
        phys = like.physical(best_fit(like))
        a_par, a_perp = float(phys["alpha_par"]), float(phys["alpha_perp"])
        out.append([a_par, a_perp, a_par ** (1 / 3) * a_perp ** (2 / 3)])
    return np.array(out)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--mocks", type=int, default=20)
    p.add_argument("--n-mesh", type=int, default=128, help="Zel'dovich mesh per side")
    p.add_argument("--density", type=float, default=3e-4,
                   help="peak n(z) of every class and the box density, (h/Mpc)^3")
    p.add_argument("--field-side", type=float, default=1.0, help="square field side, deg")
    p.add_argument("--uniform-depth", action="store_true",
                   help="null case: all classes share one n(z), so every difference from "
                        "the true selection comes from shuffling the data's own redshifts")
    p.add_argument("--random-factor", type=float, default=5.0,
                   help="randoms per galaxy (each variant)")
    args = p.parse_args()
    if args.mocks < 2:
        raise SystemExit("--mocks: give at least 2 (errors come from the mock scatter)")

    from corrpipe.cosmology import Cosmology
    from corrpipe.demo import demo_settings
    from corrpipe.mocks.make import mock_power
    from corrpipe.paircount import Binning

    cosmo = Cosmology()
    import dataclasses
    settings = dataclasses.replace(demo_settings("test", fiducial_truth=True), nbar=args.density,
                                   n_mesh=args.n_mesh, redshift=0.40)
    power = mock_power(settings, cosmo)
    fp = survey(args.field_side)
    nz_of_class = class_selection(args.density, args.uniform_depth)
    binning = Binning.from_edges(np.arange(50.0, 151.0, 10.0), np.linspace(0.0, 1.0, 21))
    s = 0.5 * (binning.edges[0][1:] + binning.edges[0][:-1])
    in_range = s >= 60.0
    results = {k: [] for k in VARIANTS}
    t0 = time.perf_counter()
    sizes, zs = [], []
    for m in range(args.mocks):
        res, n_g, n_rand, zbar = one_mock(m, args, settings, cosmo, power, fp, binning,
                                           nz_of_class)
        for k in VARIANTS:
            results[k].append(res[k])
        sizes.append((n_g, n_rand))
        zs.append(zbar)
        print(f"mock {m + 1}/{args.mocks}: {n_g} galaxies, {n_rand} randoms "
              f"({time.perf_counter() - t0:.0f} s)", file=sys.stderr)
    arr = {k: np.array(v) for k, v in results.items()}  # (mocks, ells, bins)
    n = args.mocks
    n_g = np.array(sizes)[:, 0]
    print(f"{n} Zel'dovich mocks (box {settings.box_size:g} Mpc/h, mesh {args.n_mesh}^3), "
          f"{n_g.mean():.0f} galaxies each (range {n_g.min()}-{n_g.max()}), "
          f"{args.random_factor:g}x randoms per variant; {fp.n_fields} fields, 3 depth classes")
    print("\n(a) mean over mocks of xi_l averaged over 60-150 Mpc/h, x 1e3, +- error of the mean")
    for ell, name in ((0, "xi_0"), (1, "xi_2")):
        row = []
        for k in VARIANTS:
            a = arr[k][:, ell, in_range].mean(axis=1)
            row.append(f"{k} {1e3 * a.mean():+8.3f} +- {1e3 * a.std(ddof=1) / np.sqrt(n):.3f}")
        print(f"  {name}: " + "   ".join(row))
    print("\n(b) per-mock paired differences over 60-150 Mpc/h, x 1e3 (mean +- error of the "
          "mean); chi^2 of the per-bin mean difference against 0 (diagonal)")
    for ell, name in ((0, "xi_0"), (1, "xi_2")):
        for k in ("class", "global"):
            d = arr[k][:, ell, in_range] - arr["true"][:, ell, in_range]
            avg = d.mean(axis=1)
            err_b = d.std(axis=0, ddof=1) / np.sqrt(n)
            chi2 = float(np.sum((d.mean(axis=0) / err_b) ** 2))
            print(f"  {name} {k:>6} - true: {1e3 * avg.mean():+8.3f} +- "
                  f"{1e3 * avg.std(ddof=1) / np.sqrt(n):.3f}"
                  f"  ({avg.mean() / (avg.std(ddof=1) / np.sqrt(n)):+.1f} sigma), "
                  f"chi2 {chi2:.1f} / {int(in_range.sum())} bins")
    # dilations: every variant fitted with the same diagonal covariance of one mock
    vec = {k: arr[k].reshape(n, -1) for k in VARIANTS}
    sigma = vec["true"].std(axis=0, ddof=1)
    z_eff = float(np.mean(zs))
    fits = {k: fit_dilations(s, vec[k], sigma, z_eff, cosmo) for k in VARIANTS}
    per_mock = fits["true"].std(axis=0, ddof=1)
    print(f"\n(c) best-fit dilations (z_eff = {z_eff:.3f}; truth 1 up to mode coupling), mean "
          f"over mocks +- error of the mean; per-mock error = scatter of the true fits")
    for j, q in enumerate(DILATIONS):
        row = "   ".join(f"{k} {fits[k][:, j].mean():.4f} +- "
                         f"{fits[k][:, j].std(ddof=1) / np.sqrt(n):.4f}" for k in VARIANTS)
        print(f"  {q:>10}: {row}   (per-mock sigma {per_mock[j]:.4f})")
    print("  paired differences in units of the per-mock sigma (mean +- error of the mean):")
    for k in ("class", "global"):
        for j, q in enumerate(DILATIONS):
            d = (fits[k][:, j] - fits["true"][:, j]) / per_mock[j]
            print(f"    {k:>6} - true {q:>10}: {d.mean():+.3f} +- {d.std(ddof=1) / np.sqrt(n):.3f}")
    print(f"\ntotal {time.perf_counter() - t0:.0f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
