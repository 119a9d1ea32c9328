"""The BAO data vector: per-bin distances from stored fits, external measurement files,
cross-covariances between bins, and the checks that keep the combination honest.

External measurement file (ECSV, one row per measured number):

columns
    ``z`` (effective redshift), ``quantity`` (``DM_over_rd``, ``DH_over_rd`` or
    ``DV_over_rd``), ``value``; optional ``label`` (names the sample, default
    ``<file stem>:<row>``; rows of one sample share it) and ``error`` (1-sigma).
meta (the YAML header)
    either ``covariance``: the full n x n matrix (list of rows, in row order), or an
    ``error`` column plus optional ``correlations``: a list of ``[row_i, row_j, r]``
    (0-based rows, correlation coefficient). Optional ``source``: where the numbers come from.

Cross-covariance file (ECSV, one row per covariance element between two *different* samples):
columns ``label_a``, ``quantity_a``, ``label_b``, ``quantity_b`` and ``covariance``.

Mock table (ECSV, one row per mock, one column per measured number named
``<label>:<quantity>``, e.g. ``low:DM_over_rd``): the correlations between different samples
are taken from the mocks and scaled by each measurement's own error.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from corrpipe.errors import InputError

__all__ = ["QUANTITIES", "Measurement", "DataVector", "BinSamples", "bin_from_fit",
           "read_external", "read_cross_covariance", "cross_from_mocks", "combine",
           "check_covariance"]

#: Distance ratios a measurement may carry (Mpc / Mpc).
QUANTITIES = ("DM_over_rd", "DH_over_rd", "DV_over_rd")


@dataclass(frozen=True)
class Measurement:
    """One measured distance ratio."""

    label: str
    z: float
    quantity: str
    value: float


@dataclass
class DataVector:
    """Measurements and their joint covariance.

    Attributes
    ----------
    measurements : tuple of Measurement
    covariance : ndarray, shape (n, n)
    origin : tuple of str
        Where each measurement comes from (analysis name or file path).
    """

    measurements: tuple
    covariance: np.ndarray
    origin: tuple = ()

    @property
    def n(self) -> int:
        """Number of measured numbers."""
        return len(self.measurements)

    @property
    def values(self) -> np.ndarray:
        """Measured values, shape (n,)."""
        return np.array([m.value for m in self.measurements])

    @property
    def z(self) -> np.ndarray:
        """Redshift of each measurement, shape (n,)."""
        return np.array([m.z for m in self.measurements])

    @property
    def errors(self) -> np.ndarray:
        """1-sigma errors (square roots of the covariance diagonal)."""
        return np.sqrt(np.diag(self.covariance))

    def table(self) -> list[dict]:
        """Rows for constraints.json."""
        return [dict(label=m.label, z=m.z, quantity=m.quantity, value=m.value, error=float(e),
                     origin=o) for m, e, o in zip(self.measurements, self.errors, self.origin)]


@dataclass
class BinSamples:
    """The posterior samples of one analysed bin, as distance ratios.

    Attributes
    ----------
    label : str
        Analysis name.
    z : float
        Effective redshift.
    quantities : tuple of str
        ``("DM_over_rd", "DH_over_rd")`` (anisotropic) or ``("DV_over_rd",)``.
    samples : ndarray, shape (n_samples, len(quantities))
    """

    label: str
    z: float
    quantities: tuple
    samples: np.ndarray
    notes: list = field(default_factory=list)

    def data_vector(self) -> DataVector:
        """Mean and covariance of the samples (the Gaussian approximation)."""
        mean = self.samples.mean(axis=0)
        cov = np.atleast_2d(np.cov(self.samples, rowvar=False))
        ms = tuple(Measurement(self.label, self.z, q, float(v))
                   for q, v in zip(self.quantities, mean))
        return DataVector(ms, cov, (self.label,) * len(ms))


def bin_from_fit(result, label: str | None = None) -> BinSamples:
    """Distance-ratio samples of a stored BAO fit (:class:`corrpipe.fit.FitResult`).

    The dilation samples are mapped to D/r_d with the fit's fiducial ratios (the same mapping
    as the fit's own summary, :func:`corrpipe.fit.run.summarise`) and widened about their
    median by sqrt(m1), the Percival et al. (2014) variance factor the fit reports.
    """
    from corrpipe.fit.result import dilations_from_samples

    label = label or result.name
    dil = dilations_from_samples(tuple(result.names), result.samples())
    fid = result.fiducial
    scale = float(np.sqrt(result.variance_factor))
    if result.analysis == "isotropic":
        cols = [dil["alpha"] * fid["DV_over_rd"]]
        quantities = ("DV_over_rd",)
    else:
        cols = [dil["alpha_perp"] * fid["DM_over_rd"], dil["alpha_par"] * fid["DH_over_rd"]]
        quantities = ("DM_over_rd", "DH_over_rd")
    cols = [np.median(c) + scale * (c - np.median(c)) for c in cols]
    notes = []
    if not result.converged:
        notes.append(f"the BAO fit of '{label}' did not converge: "
                     f"{result.convergence.get('note', '')}")
    for k, v in (result.diagnostics or {}).get("prior_edges", {}).items():
        if v.get("prior_limited"):
            notes.append(f"'{label}': {k} is bounded by its prior; its distances are not "
                         "Gaussian (consider likelihood = 'chain-density')")
    return BinSamples(label, float(result.z_eff), quantities, np.column_stack(cols), notes)


# ----------------------------------------------------------------------------- files


def _read_ecsv(path: Path, what: str):
    from astropy.table import Table

    if not path.exists():
        raise InputError(f"{what} {path} does not exist; check the path in the config")
    try:
        return Table.read(path, format="ascii.ecsv")
    except Exception as exc:  # astropy raises many kinds for malformed files
        raise InputError(f"{what} {path} is not a readable ECSV table ({exc}); see README, "
                         "'Cosmology from BAO distances', for the format") from exc


def read_external(path: str | Path) -> DataVector:
    """Read an external measurement file (format in the module docstring).

    Raises
    ------
    InputError
        Missing columns, unknown quantities, non-finite or non-positive values, a covariance
        of the wrong shape or not positive definite, duplicate rows.
    """
    path = Path(path)
    t = _read_ecsv(path, "external measurement file")
    missing = [c for c in ("z", "quantity", "value") if c not in t.colnames]
    if missing:
        raise InputError(f"external measurement file {path}: missing column(s) "
                         f"{', '.join(missing)}; it needs z, quantity, value")
    n = len(t)
    if n == 0:
        raise InputError(f"external measurement file {path} has no rows")
    z = np.asarray(t["z"], dtype=float)
    value = np.asarray(t["value"], dtype=float)
    quantity = [str(q) for q in t["quantity"]]
    labels = ([str(x) for x in t["label"]] if "label" in t.colnames
              else [f"{path.stem}:{i}" for i in range(n)])
    for i, q in enumerate(quantity):
        if q not in QUANTITIES:
            raise InputError(f"external measurement file {path}, row {i}: quantity {q!r} is "
                             f"unknown; use one of {', '.join(QUANTITIES)}")
    bad = np.flatnonzero(~np.isfinite(z) | ~np.isfinite(value) | (value <= 0))
    if bad.size:
        raise InputError(f"external measurement file {path}, rows {bad.tolist()}: z and "
                         "value must be finite and the value positive")
    meta = dict(t.meta)
    if "covariance" in meta:
        cov = np.asarray(meta["covariance"], dtype=float)
        if cov.shape != (n, n):
            raise InputError(f"external measurement file {path}: the covariance in the header "
                             f"is {cov.shape}, the table has {n} rows; give an n x n matrix")
    elif "error" in t.colnames:
        err = np.asarray(t["error"], dtype=float)
        if np.any(~np.isfinite(err) | (err <= 0)):
            raise InputError(f"external measurement file {path}: column 'error' must be "
                             "positive and finite in every row")
        corr = np.eye(n)
        for entry in meta.get("correlations", []) or []:
            try:
                i, j, r = int(entry[0]), int(entry[1]), float(entry[2])
            except (TypeError, ValueError, IndexError) as exc:
                raise InputError(f"external measurement file {path}: correlations entry "
                                 f"{entry!r} must be [row_i, row_j, r]") from exc
            if not (0 <= i < n and 0 <= j < n) or i == j:
                raise InputError(f"external measurement file {path}: correlations entry "
                                 f"{entry!r} names rows outside 0..{n - 1} or a row twice")
            corr[i, j] = corr[j, i] = r
        cov = corr * np.outer(err, err)
    else:
        raise InputError(f"external measurement file {path}: give either a 'covariance' "
                         "matrix in the header or an 'error' column")
    check_covariance(cov, f"external measurement file {path}")
    ms = tuple(Measurement(lb, float(zz), q, float(v))
               for lb, zz, q, v in zip(labels, z, quantity, value))
    _check_duplicates(ms, [str(path)] * n)
    return DataVector(ms, cov, (str(path),) * n)


def read_cross_covariance(path: str | Path) -> list[tuple[str, str, str, str, float]]:
    """Read a cross-covariance file: ``(label_a, quantity_a, label_b, quantity_b, cov)``."""
    path = Path(path)
    t = _read_ecsv(path, "cross-covariance file")
    need = ("label_a", "quantity_a", "label_b", "quantity_b", "covariance")
    missing = [c for c in need if c not in t.colnames]
    if missing:
        raise InputError(f"cross-covariance file {path}: missing column(s) "
                         f"{', '.join(missing)}; it needs {', '.join(need)}")
    return [(str(r["label_a"]), str(r["quantity_a"]), str(r["label_b"]), str(r["quantity_b"]),
             float(r["covariance"])) for r in t]


def cross_from_mocks(path: str | Path, data: DataVector
                     ) -> list[tuple[str, str, str, str, float]]:
    """Cross-covariances between different samples from a table of per-mock distances.

    The correlation coefficient of two measurements across the mocks (each mock fitted in
    every bin, so its bins are joint samples) times the two measurements' own errors.
    Entries within one sample are left to the sample's own covariance.
    """
    path = Path(path)
    t = _read_ecsv(path, "mock distance table")
    keys = [f"{m.label}:{m.quantity}" for m in data.measurements]
    present = [k for k in keys if k in t.colnames]
    if len(t) < len(present) + 2:
        raise InputError(f"mock distance table {path} has {len(t)} mocks for {len(present)} "
                         "measurements; it needs more mocks than measurements")
    cols = np.column_stack([np.asarray(t[k], dtype=float) for k in present])
    corr = np.corrcoef(cols, rowvar=False)
    err = dict(zip(keys, data.errors))
    out = []
    for i, a in enumerate(present):
        for j, b in enumerate(present[:i]):
            la, qa = a.rsplit(":", 1)
            lb, qb = b.rsplit(":", 1)
            if la != lb:
                out.append((la, qa, lb, qb, float(corr[i, j] * err[a] * err[b])))
    return out


# ----------------------------------------------------------------------------- checks


def check_covariance(cov: np.ndarray, where: str) -> None:
    """Raise :class:`InputError` unless ``cov`` is finite, symmetric and positive definite."""
    cov = np.asarray(cov, dtype=float)
    if not np.all(np.isfinite(cov)):
        raise InputError(f"{where}: the covariance has non-finite entries")
    if not np.allclose(cov, cov.T, rtol=1e-8, atol=1e-12 * np.max(np.abs(cov))):
        raise InputError(f"{where}: the covariance is not symmetric")
    eig = np.linalg.eigvalsh(cov)
    if eig[0] <= 0:
        raise InputError(f"{where}: the covariance is not positive definite (smallest "
                         f"eigenvalue {eig[0]:.3g}); check the errors and correlations "
                         "(|r| < 1)")


def _check_duplicates(ms: Sequence[Measurement], origin: Sequence[str]) -> None:
    seen: dict[tuple, int] = {}
    for i, m in enumerate(ms):
        for key in ((m.label, m.quantity), (round(m.z, 4), m.quantity)):
            if key in seen:
                j = seen[key]
                raise InputError(
                    f"duplicate measurement: {m.quantity} at z = {m.z:g} ('{m.label}', from "
                    f"{origin[i]}) and at z = {ms[j].z:g} ('{ms[j].label}', from {origin[j]}) "
                    "measure the same thing; drop one of them")
            seen[key] = i


def combine(parts: Iterable[DataVector],
            cross: Sequence[tuple[str, str, str, str, float]] = ()) -> DataVector:
    """Join data vectors into one (block-diagonal covariance plus ``cross`` terms).

    Raises
    ------
    InputError
        Duplicate measurements (one bin given twice, or the same quantity at the same
        redshift), cross terms naming unknown measurements, or a joint covariance that is
        not positive definite.
    """
    parts = list(parts)
    ms = tuple(m for p in parts for m in p.measurements)
    origin = tuple(o for p in parts for o in p.origin)
    _check_duplicates(ms, origin)
    n = len(ms)
    cov = np.zeros((n, n))
    i = 0
    for p in parts:
        cov[i:i + p.n, i:i + p.n] = p.covariance
        i += p.n
    index = {(m.label, m.quantity): k for k, m in enumerate(ms)}
    for la, qa, lb, qb, c in cross:
        if (la, qa) not in index or (lb, qb) not in index:
            missing = (la, qa) if (la, qa) not in index else (lb, qb)
            raise InputError(f"cross-covariance names {missing[1]} of '{missing[0]}', which is "
                             f"not in the data vector (labels: "
                             f"{', '.join(sorted({m.label for m in ms}))})")
        a, b = index[(la, qa)], index[(lb, qb)]
        cov[a, b] = cov[b, a] = c
    check_covariance(cov, "joint covariance of the data vector")
    return DataVector(ms, cov, origin)
