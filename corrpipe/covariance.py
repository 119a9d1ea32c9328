"""Covariance matrices of estimator vectors: jackknife, mocks, and the Gaussian box form.

Every estimator returns a :class:`CovarianceResult` that knows how many samples built it, its
condition number, the Hartlap et al. (2007) debiasing factor of its inverse and the Percival et
al. (2014) factors for parameter errors, and can be stored in an HDF5 group.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np
from scipy.special import spherical_jn
from tqdm.auto import tqdm

from corrpipe.errors import ConfigError, InputError, StageError
from corrpipe.estimators import correlation
from corrpipe.paircount.result import PairCounts
from corrpipe.survey.regions import RegionSettings
from corrpipe.settings import setting
from corrpipe.terminal import show_bars

__all__ = [
    "CovarianceResult",
    "CovarianceSettings",
    "hartlap_factor",
    "percival_factors",
    "mohammad_percival_weight",
    "jackknife_samples",
    "jackknife_covariance",
    "jackknife_from_counts",
    "expand_mock_paths",
    "mock_covariance",
    "gaussian_box_covariance",
]


def hartlap_factor(n_samples: int, n_bins: int) -> float:
    """(n - p - 2) / (n - 1): debiasing factor of the inverse of a sample covariance.

    Notes
    -----
    Hartlap, Simon & Schneider (2007), eq. 17 [equation number from memory]; valid for
    p < n - 2, with the mean estimated from the same n samples.
    """
    n, p = int(n_samples), int(n_bins)
    if not p < n - 2:
        raise StageError(f"{n} samples cannot give an invertible covariance of {p} bins: the "
                         f"Hartlap correction needs n_samples > n_bins + 2 = {p + 2}; use more "
                         "mocks/regions or fewer bins")
    return (n - p - 2) / (n - 1)


def percival_factors(n_samples: int, n_bins: int, n_params: int) -> tuple[float, float]:
    """Percival et al. (2014) factors (m1, m2) for parameter errors from a mock covariance.

    Returns
    -------
    m1 : float
        Multiplies the parameter variance from the likelihood width (Hartlap-debiased
        precision matrix used).
    m2 : float
        Multiplies the sample variance of best fits to the mocks.

    Notes
    -----
    A = 2/[(n_s - n_b - 1)(n_s - n_b - 4)], B = (n_s - n_b - 2)/[(n_s - n_b - 1)(n_s - n_b - 4)],
    m1 = [1 + B(n_b - n_p)]/[1 + A + B(n_p + 1)], m2 = m1 (n_s - 1)/(n_s - n_b - 2)
    (Percival et al. 2014, eqs. 18, 22 [from memory]).
    """
    ns, nb, npar = int(n_samples), int(n_bins), int(n_params)
    if not ns - nb - 4 > 0:
        raise StageError(f"Percival factors need n_samples > n_bins + 4 ({ns} samples, {nb} "
                         "bins)")
    a = 2.0 / ((ns - nb - 1.0) * (ns - nb - 4.0))
    b = (ns - nb - 2.0) / ((ns - nb - 1.0) * (ns - nb - 4.0))
    m1 = (1.0 + b * (nb - npar)) / (1.0 + a + b * (npar + 1.0))
    return m1, m1 * (ns - 1.0) / (ns - nb - 2.0)


def mohammad_percival_weight(n_regions: int) -> float:
    """Weight of the one-member ("cross") pairs removed in the Mohammad & Percival jackknife.

    alpha = n / [2 + sqrt(2) (n - 1)] for n regions [from memory: Mohammad & Percival 2022,
    MNRAS 514, 1289; unverified against the paper]. The standard jackknife is alpha = 1.

    Notes
    -----
    Why about 1/sqrt(2): a pair that straddles regions k and l leaves both delete-k and
    delete-l samples, so with alpha = 1 its variance enters the jackknife sum twice; weighting
    it by alpha in each sample counts it 2 alpha^2 times, once for alpha = 1/sqrt(2), the
    large-n limit of the formula. When the regions are smaller than the separations (most
    pairs straddle), the standard jackknife variance approaches twice the truth. On the demo
    survey mocks (100 regions, 50-150 Mpc/h) the standard jackknife gave 2.0-2.4x the mock
    variance of the BAO-weighted combinations of the multipoles and this weighting 1.15-1.2x
    (20 mocks, ~30 % noise; ``scripts/calibrate_jackknife.py``).
    """
    n = float(n_regions)
    return n / (2.0 + np.sqrt(2.0) * (n - 1.0))


@dataclass(frozen=True, eq=False)
class CovarianceResult:
    """A covariance matrix of an estimator vector and what is needed to use it.

    Attributes
    ----------
    matrix : ndarray, shape (n_bins, n_bins)
    kind : {"jackknife", "mocks", "analytic"}
    n_samples : int
        Jackknife regions or mocks (0 for analytic).
    mean : ndarray, shape (n_bins,) or None
        Mean of the samples.
    meta : dict
        Free-form scalars (e.g. the jackknife cross-pair weight).
    """

    matrix: np.ndarray
    kind: str
    n_samples: int = 0
    mean: np.ndarray | None = None
    meta: dict = field(default_factory=dict)

    @property
    def n_bins(self) -> int:
        """Length of the estimator vector."""
        return int(self.matrix.shape[0])

    @property
    def errors(self) -> np.ndarray:
        """Square root of the diagonal."""
        return np.sqrt(np.diag(self.matrix))

    @property
    def condition_number(self) -> float:
        """2-norm condition number (inf if singular)."""
        with np.errstate(divide="ignore"):
            return float(np.linalg.cond(self.matrix))

    @property
    def hartlap(self) -> float:
        """Hartlap factor for sampled covariances (1 for analytic ones)."""
        if self.kind == "analytic":
            return 1.0
        return hartlap_factor(self.n_samples, self.n_bins)

    def percival(self, n_params: int) -> tuple[float, float]:
        """Percival et al. (2014) (m1, m2) for a fit with ``n_params`` parameters."""
        if self.kind == "analytic":
            return 1.0, 1.0
        return percival_factors(self.n_samples, self.n_bins, n_params)

    def check_invertible(self, max_condition: float = 1e12) -> None:
        """Raise StageError, saying why, when the matrix cannot be safely inverted."""
        if self.kind != "analytic" and self.n_samples - 1 < self.n_bins:
            raise StageError(
                f"{self.kind} covariance from {self.n_samples} samples has rank at most "
                f"{self.n_samples - 1} < {self.n_bins} bins, so it is singular; use at least "
                f"{self.n_bins + 3} {'regions' if self.kind == 'jackknife' else 'mocks'} "
                "(covariance.n_regions) or fewer bins (merge s bins, fewer multipoles)")
        if not np.all(np.isfinite(self.matrix)):
            raise StageError(f"{self.kind} covariance contains NaN/inf (empty bins?); "
                             "check the separation range and the pair counts")
        cond = self.condition_number
        if not cond < max_condition:
            raise StageError(f"{self.kind} covariance is ill-conditioned (condition number "
                             f"{cond:.3g} >= {max_condition:.3g}); reduce the number of bins "
                             "or use more samples")

    def precision(self, debias: bool = True, max_condition: float = 1e12) -> np.ndarray:
        """Inverse covariance, times the Hartlap factor when ``debias`` (sampled kinds)."""
        self.check_invertible(max_condition)
        inv = np.linalg.inv(self.matrix)
        return inv * (self.hartlap if debias else 1.0)

    def to_hdf5_group(self, group) -> None:
        """Store in an h5py group."""
        group.create_dataset("matrix", data=self.matrix)
        if self.mean is not None:
            group.create_dataset("mean", data=self.mean)
        group.attrs["kind"] = self.kind
        group.attrs["n_samples"] = int(self.n_samples)
        group.attrs["condition_number"] = self.condition_number
        for key, value in self.meta.items():
            group.attrs[f"meta_{key}"] = value

    @classmethod
    def from_hdf5_group(cls, group) -> "CovarianceResult":
        """Read what :meth:`to_hdf5_group` wrote."""
        meta = {k[5:]: group.attrs[k] for k in group.attrs if k.startswith("meta_")}
        mean = np.asarray(group["mean"][()]) if "mean" in group else None
        return cls(np.asarray(group["matrix"][()]), str(group.attrs["kind"]),
                   int(group.attrs["n_samples"]), mean, meta)


def _as_samples(vectors, what: str) -> np.ndarray:
    x = np.asarray(vectors, dtype=np.float64)
    if x.ndim != 2:
        raise InputError(f"{what} must be a 2-D stack (n_samples, n_bins); got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        bad = np.unique(np.nonzero(~np.isfinite(x))[0])
        raise InputError(f"{what}: samples {bad[:10].tolist()} contain NaN/inf (empty bins "
                         "in a jackknife region or mock?)")
    return x


def _centred(vectors, what: str, unit: str) -> tuple[int, np.ndarray, np.ndarray]:
    """(n_samples, mean, deviations from the mean) of a checked sample stack."""
    x = _as_samples(vectors, what)
    if x.shape[0] < 2:
        raise InputError(f"a covariance needs at least 2 {unit}; got {x.shape[0]}")
    mean = x.mean(axis=0)
    return x.shape[0], mean, x - mean


def _n_regions(dd: PairCounts) -> int:
    if dd.n_regions < 2:
        raise InputError("the DD counts carry no jackknife regions; count pairs with region "
                         "labels (covariance.kind = 'jackknife')")
    return dd.n_regions


def _cross_weight(weighting: str, cross_weight: float | None, n_regions: int) -> float:
    if cross_weight is not None and cross_weight > 0:
        return float(cross_weight)
    if weighting == "standard":
        return 1.0
    if weighting == "mohammad_percival":
        return mohammad_percival_weight(n_regions)
    raise ConfigError(f"covariance.jackknife_weighting = {weighting!r} is not 'standard' or "
                      "'mohammad_percival'")


def jackknife_from_counts(counts, estimate_settings, covariance_settings, rppi_counts=None,
                          vector: str = "multipoles", progress: bool = True,
                          check: bool = True) -> CovarianceResult:
    """Jackknife covariance of an estimator vector straight from stored pair counts.

    Parameters
    ----------
    counts, rppi_counts
        As for :func:`corrpipe.estimators.estimate_from_counts`.
    estimate_settings : EstimateSettings
    covariance_settings : CovarianceSettings
        ``jackknife_weighting``, ``cross_weight`` and ``max_condition`` are used.
    vector : {"multipoles", "wedges", "wp"}
    check : bool
        Check that the whole matrix can be inverted. The pipeline stores the full vector's
        covariance and checks only the block the fit uses, so it passes False.

    Returns
    -------
    CovarianceResult

    Raises
    ------
    StageError
        Too few regions for the number of bins, or an ill-conditioned matrix.
    """
    from corrpipe.estimators import estimate_from_counts

    dd = counts["DD"]
    n_regions = _n_regions(dd if isinstance(dd, PairCounts) else dd[0])
    cw = _cross_weight(covariance_settings.jackknife_weighting,
                       covariance_settings.cross_weight, n_regions)
    out = []
    for k in tqdm(range(n_regions), desc="jackknife", disable=not show_bars(progress)):
        est = estimate_from_counts(counts, estimate_settings, rppi_counts, delete_region=k,
                                   cross_weight=cw)
        out.append(est.vector(vector))
    cov = jackknife_covariance(np.array(out), cw)
    if check:
        cov.check_invertible(covariance_settings.max_condition)
    return cov


def jackknife_samples(dd: PairCounts, rr, dr=None, *, vector: Callable[[np.ndarray], np.ndarray]
                      = np.ravel, estimator: str = "landy_szalay", ds=None, ss=None,
                      weighting: str = "mohammad_percival",
                      cross_weight: float | None = None,
                      progress: bool = True) -> tuple[np.ndarray, float]:
    """Delete-one estimator vectors, one per jackknife region.

    Parameters
    ----------
    dd, rr, dr, ds, ss
        Pair counts with region information (RR may be a list of split sets or an analytic
        box RR without regions).
    vector : callable
        Maps xi (shape of the counts) to the estimator vector (e.g. multipoles, flattened).
    estimator : str
        See :func:`corrpipe.estimators.correlation`.
    weighting : {"mohammad_percival", "standard"}
        The Mohammad & Percival (2022) weighting of cross pairs (default), or the standard
        delete-one jackknife (cross pairs removed with weight 1), which overestimates the
        variance by up to 2x when most pairs straddle regions.
    cross_weight : float, optional
        Explicit cross-pair weight overriding ``weighting``.

    Returns
    -------
    samples : ndarray, shape (n_regions, n_bins)
    cross_weight : float
        The cross-pair weight used.
    """
    n_regions = _n_regions(dd)
    cross_weight = _cross_weight(weighting, cross_weight, n_regions)
    out = []
    for k in tqdm(range(n_regions), desc="jackknife", disable=not show_bars(progress)):
        xi = correlation(dd, rr, dr, ds=ds, ss=ss, estimator=estimator, delete_region=k,
                         cross_weight=cross_weight)
        out.append(np.asarray(vector(xi), dtype=np.float64))
    return np.array(out), float(cross_weight)


def jackknife_covariance(samples, cross_weight: float = 1.0) -> CovarianceResult:
    """Delete-one jackknife covariance C = (N - 1)/N Σ_k (x_k - x̄)(x_k - x̄)^T.

    Notes
    -----
    Standard delete-one jackknife (Efron 1982; as written in Mohammad & Percival 2022).
    """
    n, mean, d = _centred(samples, "jackknife samples", "regions")
    cov = (n - 1.0) / n * (d.T @ d)
    return CovarianceResult(cov, "jackknife", n, mean, {"cross_weight": float(cross_weight)})


def mock_covariance(vectors) -> CovarianceResult:
    """Sample covariance of estimator vectors measured on mocks (unbiased, 1/(n - 1))."""
    n, mean, d = _centred(vectors, "mock vectors", "mocks")
    return CovarianceResult(d.T @ d / (n - 1.0), "mocks", n, mean)


def expand_mock_paths(patterns: Sequence[str], key: str = "covariance.mocks") -> list[str]:
    """Sorted file list from paths and glob patterns; every pattern must match something.

    Raises
    ------
    ConfigError
        No pattern given, or a pattern that matches no file (named in the message).
    """
    import glob
    import os

    if not patterns:
        raise ConfigError(f"{key} is empty; list mock catalogue files or glob patterns such as "
                          "'mocks/mock_*.fits'")
    files: list[str] = []
    for pattern in patterns:
        hits = sorted(glob.glob(os.fspath(pattern)))
        if not hits:
            raise ConfigError(f"{key}: '{pattern}' matches no file; check the path (relative "
                              "paths are taken from the config file's folder)")
        files.extend(hits)
    return sorted(dict.fromkeys(files))


def _power_callable(pk) -> Callable[[np.ndarray], np.ndarray]:
    if callable(pk):
        return pk
    try:
        k_tab, p_tab = (np.asarray(a, dtype=np.float64) for a in pk)
    except (TypeError, ValueError) as exc:
        raise InputError("P(k) must be a callable or a (k, P) table of two arrays") from exc
    if k_tab.ndim != 1 or k_tab.shape != p_tab.shape or np.any(np.diff(k_tab) <= 0) \
            or np.any(k_tab <= 0):
        raise InputError("P(k) table needs increasing k > 0 and one P per k")

    def interp(k):
        return np.interp(np.log(k), np.log(k_tab), p_tab, left=p_tab[0], right=0.0)

    return interp


def _bin_averaged_bessel(ell: int, k: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Volume-averaged j_l(k s) over the shell lo <= s < hi (Gauss–Legendre in s)."""
    n_nodes = int(0.6 * k.max() * (hi - lo)) + 24
    x, w = np.polynomial.legendre.leggauss(n_nodes)
    s = 0.5 * (hi + lo) + 0.5 * (hi - lo) * x
    ws = 0.5 * (hi - lo) * w * s**2
    return (spherical_jn(ell, np.outer(k, s)) @ ws) / np.sum(ws)


def gaussian_box_covariance(pk, nbar: float, volume: float, s_edges,
                            ells: Sequence[int] = (0, 2, 4), beta: float = 0.0,
                            k_max: float = 2.0, n_k: int | None = None) -> CovarianceResult:
    """Gaussian covariance of correlation-function multipoles in a periodic box.

    Parameters
    ----------
    pk : callable or (k, P) table
        Real-space power spectrum P(k) in (Mpc/h)^3, k in h/Mpc.
    nbar : float
        Number density, (h/Mpc)^3.
    volume : float
        Box volume, (Mpc/h)^3.
    s_edges : array_like
        Separation bin edges, Mpc/h.
    ells : sequence of int
        Multipoles (even orders).
    beta : float
        Kaiser factor f/b: P(k, mu) = (1 + beta mu^2)^2 P(k) (Kaiser 1987).
    k_max : float
        Upper limit of the k integral, h/Mpc (the pure shot-noise term is done exactly).
    n_k : int, optional
        Points of the linear k grid (default: spacing pi / (8 s_max)).

    Returns
    -------
    CovarianceResult
        Blocks ordered as the vector [xi_l0(s_0..), xi_l1(s_0..), ...].

    Notes
    -----
    C_{l1 l2}(s_i, s_j) = i^{l1+l2}/(2 pi^2) ∫ k^2 sigma^2_{l1 l2}(k) jbar_l1(k s_i)
    jbar_l2(k s_j) dk, sigma^2_{l1 l2}(k) = (2 l1 + 1)(2 l2 + 1)/V ∫_{-1}^{1}
    [P(k, mu) + 1/nbar]^2 L_l1 L_l2 dmu (Grieb et al. 2016, eqs. 15-19 [from memory]), with
    jbar the shell-volume average of j_l. The 1/nbar^2 part is evaluated in closed form,
    2 (2l + 1) δ_ij δ_l1l2 / (nbar^2 V V_i), from the orthogonality of spherical Bessel functions.
    """
    edges = np.asarray(s_edges, dtype=np.float64)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] < 0:
        raise InputError("s_edges must be increasing, non-negative separations in Mpc/h")
    if not (nbar > 0 and volume > 0):
        raise InputError(f"Gaussian covariance needs nbar > 0 and volume > 0; got nbar = "
                         f"{nbar}, volume = {volume}")
    ells = [int(e) for e in ells]
    if any(e % 2 for e in ells):
        raise ConfigError(f"Gaussian covariance is for even multipoles; got {ells}")
    power = _power_callable(pk)
    n_k = int(n_k or max(256, np.ceil(k_max / (np.pi / (8 * edges[-1])))))
    k = np.linspace(k_max / n_k, k_max, n_k)
    p = np.asarray(power(k), dtype=np.float64)
    mu, wmu = np.polynomial.legendre.leggauss(16)
    kaiser = (1.0 + beta * mu**2) ** 2
    # [P(k,mu) + 1/n]^2 - 1/n^2 = P_s^2 + 2 P_s / n; the 1/n^2 part is added analytically
    excess = (p[:, None] * kaiser[None, :]) ** 2 + 2.0 * p[:, None] * kaiser[None, :] / nbar
    legendre = {e: np.polynomial.legendre.legval(mu, np.eye(e + 1)[e]) for e in ells}
    n_s = edges.size - 1
    jbar = {e: np.column_stack([_bin_averaged_bessel(e, k, edges[i], edges[i + 1])
                                for i in range(n_s)]) for e in ells}
    shell = 4.0 * np.pi / 3.0 * (edges[1:] ** 3 - edges[:-1] ** 3)
    dk = np.full(n_k, k[1] - k[0])
    dk[0] = dk[-1] = 0.5 * dk[0]  # trapezoid
    cov = np.zeros((len(ells) * n_s, len(ells) * n_s))
    for a, l1 in enumerate(ells):
        for b, l2 in enumerate(ells):
            if b < a:
                continue
            sigma2 = ((2 * l1 + 1) * (2 * l2 + 1) / volume
                      * (excess * (legendre[l1] * legendre[l2] * wmu)[None, :]).sum(axis=1))
            sign = (-1) ** ((l1 + l2) // 2)
            kern = (k**2 * sigma2 * dk)[:, None] * jbar[l1]
            block = sign / (2.0 * np.pi**2) * (kern.T @ jbar[l2])
            if l1 == l2:
                block = block + np.diag(2.0 * (2 * l1 + 1) / (nbar**2 * volume * shell))
            cov[a * n_s:(a + 1) * n_s, b * n_s:(b + 1) * n_s] = block
            cov[b * n_s:(b + 1) * n_s, a * n_s:(a + 1) * n_s] = block.T
    return CovarianceResult(cov, "analytic", 0, None,
                            {"nbar": float(nbar), "volume": float(volume), "beta": float(beta),
                             "k_max": float(k_max)})


@dataclass(frozen=True)
class CovarianceSettings(RegionSettings):
    """Config section ``[covariance]``: how error bars are estimated."""

    kind: str = setting("jackknife", "covariance estimate",
                        choices=("jackknife", "mocks", "analytic"))
    jackknife_weighting: str = setting("mohammad_percival", "weight of pairs with one member "
                                       "in the deleted region: Mohammad & Percival (2022) "
                                       "or 1 (standard delete-one, which counts their "
                                       "variance twice)", choices=("mohammad_percival",
                                                                   "standard"))
    cross_weight: float = setting(0.0, "explicit cross-pair weight (0 = from "
                                  "jackknife_weighting)", low=0.0, high=1.0)
    mocks: tuple[str, ...] = setting((), "mock catalogue files or glob patterns (kind = "
                                     "'mocks')", path=True)
    pk_file: str = setting("", "P(k) table (k [h/Mpc], P [(Mpc/h)^3]) for kind = 'analytic'; "
                           "empty = linear theory of the fiducial cosmology", path=True)
    beta: float = setting(0.0, "Kaiser factor f/b of the analytic covariance", low=0.0,
                          high=5.0)
    bias: float = setting(2.0, "linear bias b: the analytic covariance uses b^2 P_lin(k) when "
                          "no pk_file is given", low=0.1, high=20.0)
    k_max: float = setting(2.0, "upper k of the analytic covariance integral", unit="h/Mpc",
                           low=0.0, low_open=True)
    max_condition: float = setting(1e12, "largest acceptable condition number", low=1.0)
