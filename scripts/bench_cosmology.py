"""Benchmark of the expansion-history fit: one likelihood call, a converged w0wa chain, and
the batch stage on stored results.

Targets (issue 14): one likelihood evaluation of a 7-bin w0waCDM data vector <= 1 ms; a
converged w0wa chain <= 60 s on 2 cores; the stage on stored results <= 90 s in total. The
likelihood is also timed with astropy.cosmology computing the distances (a Flatw0waCDM built
per call), so the ratio of the two is measured in the same run.

Usage: PYTHONPATH=. python scripts/bench_cosmology.py [--repeats N] [--config BATCH.toml]

Without --config the stage is timed on a small invented two-bin survey whose analyses are run
first (not timed); with --config, on that batch's stored results (its [expansion] table,
whether or not it is enabled).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from corrpipe.cosmo import (DataVector, DistanceLikelihood, ExpansionModel,  # noqa: E402
                            Measurement, ParameterSpace, sample_posterior)

C_KM_S = 299792.458


def invented_survey() -> DataVector:
    """'Kestrel Deep Survey' (invented): 7 anisotropic bins, 1.5-3 % errors, r = -0.4."""
    z = np.array([0.35, 0.55, 0.75, 0.95, 1.2, 1.5, 2.1])
    model = ExpansionModel("w0wacdm").grid(z)
    truth = dict(Omega_m=0.31, h=0.68, h_rd=100.0, w0=-0.85, wa=-0.4)
    r = model.over_rd(truth)
    ms, blocks = [], []
    for i, zz in enumerate(z):
        dm, dh = r["DM_over_rd"][i], r["DH_over_rd"][i]
        e_dm, e_dh = 0.015 * dm, 0.03 * dh
        ms += [Measurement(f"K{i + 1}", float(zz), "DM_over_rd", float(dm)),
               Measurement(f"K{i + 1}", float(zz), "DH_over_rd", float(dh))]
        blocks.append(np.array([[e_dm**2, -0.4 * e_dm * e_dh], [-0.4 * e_dm * e_dh, e_dh**2]]))
    cov = np.zeros((14, 14))
    for i, b in enumerate(blocks):
        cov[2 * i:2 * i + 2, 2 * i:2 * i + 2] = b
    return DataVector(tuple(ms), cov, ("invented",) * 14)


def astropy_log_like(data: DataVector, theta: np.ndarray, precision: np.ndarray) -> float:
    """The same Gaussian likelihood with astropy.cosmology distances (reference speed)."""
    from astropy.cosmology import Flatw0waCDM

    om, h_rd, w0, wa = theta
    c = Flatw0waCDM(H0=68.0, Om0=om, w0=w0, wa=wa, Tcmb0=2.7255, Neff=3.044,
                    m_nu=[0.0, 0.0, 0.06])
    z = data.z
    dm = c.comoving_transverse_distance(z).value * 0.68 / h_rd
    dh = C_KM_S / c.H(z).value * 0.68 / h_rd
    model = np.where([m.quantity == "DM_over_rd" for m in data.measurements], dm, dh)
    r = data.values - model
    return -0.5 * float(r @ precision @ r)


def bench_likelihood(repeats: int) -> tuple[float, float, float]:
    data = invented_survey()
    like = DistanceLikelihood(ParameterSpace(ExpansionModel("w0wacdm")), data)
    theta = np.array([0.30, 99.0, -0.9, -0.2])
    ours = like.log_posterior(theta)
    t0 = time.perf_counter()
    for _ in range(repeats):
        like.log_posterior(theta)
    t_ours = (time.perf_counter() - t0) / repeats
    precision = np.linalg.inv(data.covariance)
    ref = astropy_log_like(data, theta, precision)
    n_ref = max(20, repeats // 200)
    t0 = time.perf_counter()
    for _ in range(n_ref):
        astropy_log_like(data, theta, precision)
    t_ref = (time.perf_counter() - t0) / n_ref
    return t_ours, t_ref, abs(ours - ref)


def bench_chain() -> tuple[float, object]:
    like = DistanceLikelihood(ParameterSpace(ExpansionModel("w0wacdm")), invented_survey())
    t0 = time.perf_counter()
    res = sample_posterior(like, seed=5, progress=False)
    return time.perf_counter() - t0, res


def bench_stage(config: Path | None) -> tuple[float, str]:
    from corrpipe import api

    if config is not None:
        t0 = time.perf_counter()
        api.cosmology(config, force=True, progress=False)
        return time.perf_counter() - t0, str(config)
    from tests.integration.conftest import BASE_CONFIG, write_poisson_survey

    folder = Path(tempfile.mkdtemp(prefix="bench_cosmology_"))
    write_poisson_survey(folder)
    ext = folder / "kestrel.ecsv"
    _write_invented_external(ext)
    cfg = folder / "bins.toml"
    cfg.write_text(BASE_CONFIG + f'\n[expansion]\nenabled = false\nmodel = "w0wacdm"\n'
                   f'external = ["{ext}"]\n\n[analyses.near]\ncatalogue = {{ z_max = 0.5 }}\n\n'
                   '[analyses.far]\ncatalogue = { z_min = 0.5 }\n')
    api.run(cfg, progress=False)      # the analyses (not timed)
    t0 = time.perf_counter()
    api.cosmology(cfg, force=True, progress=False)
    return time.perf_counter() - t0, f"{cfg} (invented two-bin survey + 7 invented bins)"


def _write_invented_external(path: Path) -> None:
    from astropy.table import Table

    d = invented_survey()
    t = Table({"label": [m.label for m in d.measurements], "z": d.z,
               "quantity": [m.quantity for m in d.measurements], "value": d.values})
    t.meta["covariance"] = d.covariance.tolist()
    t.meta["source"] = "invented benchmark survey"
    t.write(path, format="ascii.ecsv", overwrite=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=20000)
    parser.add_argument("--config", type=Path, default=None)
    args = parser.parse_args()
    t_ours, t_ref, diff = bench_likelihood(args.repeats)
    print(f"likelihood, 7-bin w0waCDM (14 numbers): {1e3 * t_ours:.3f} ms per call "
          f"(target 1 ms: {t_ours / 1e-3:.2f}x target); with astropy distances "
          f"{1e3 * t_ref:.2f} ms ({t_ref / t_ours:.0f}x slower); |ln L difference| = "
          f"{diff:.2e}")
    t_chain, res = bench_chain()
    conv = res.convergence
    print(f"w0wa chain: {t_chain:.1f} s (target 60 s: {t_chain / 60:.2f}x); converged = "
          f"{conv['converged']}, {conv['n_steps']} steps x {conv['n_walkers']} walkers, "
          f"max tau = {max(conv['tau']):.0f}")
    print(res.text_summary())
    t_stage, where = bench_stage(args.config)
    print(f"stage on stored results: {t_stage:.1f} s (target 90 s: {t_stage / 90:.2f}x) for "
          f"{where}")


if __name__ == "__main__":
    main()
