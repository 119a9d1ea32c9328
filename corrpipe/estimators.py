"""Correlation-function estimators from normalised pair counts, and their projections.

Estimators take :class:`corrpipe.paircount.PairCounts` (or, for split-random RR, a sequence of
them, one per independent random set) and return xi with the shape of the counts. Projections
turn xi(s, mu) into multipoles and wedges and xi(r_p, pi) into w_p(r_p). Stored counts can be
rebinned in s and mu without recounting.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Sequence, Union

import numpy as np
from scipy.special import eval_legendre

from corrpipe.errors import ConfigError, InputError
from corrpipe.paircount.result import PairCounts
from corrpipe.settings import setting

__all__ = [
    "ESTIMATORS",
    "EstimateSettings",
    "normalised_counts",
    "region_norms",
    "landy_szalay",
    "peebles_hauser",
    "davis_peebles",
    "hamilton",
    "shifted_landy_szalay",
    "correlation",
    "legendre_bin_integrals",
    "multipoles",
    "wedges",
    "projected",
    "rebin_counts",
    "Estimate",
    "estimate_from_counts",
]

Counts = Union[PairCounts, Sequence[PairCounts]]

ESTIMATORS = ("landy_szalay", "peebles_hauser", "davis_peebles", "hamilton")


def _as_list(counts: Counts) -> list[PairCounts]:
    if isinstance(counts, PairCounts):
        return [counts]
    items = list(counts)
    if not items or not all(isinstance(c, PairCounts) for c in items):
        raise InputError("expected PairCounts or a non-empty list of PairCounts (split sets)")
    return items


def region_norms(pc: PairCounts) -> tuple[np.ndarray, np.ndarray]:
    """Per-region weighted pair totals: (both members in k, exactly one member in k).

    Returns two arrays of shape (n_regions,). Together with ``pc.norm`` they give the
    delete-one normalisation ``norm - both[k] - one[k]`` (= ``pc.jackknife_norm(k)``).
    """
    if pc.region_sum_w1 is None:
        raise InputError("these pair counts carry no jackknife regions; count them with "
                         "region labels to use a jackknife covariance")
    w1, q1 = np.asarray(pc.region_sum_w1, float), np.asarray(pc.region_sum_w1_sq, float)
    if pc.auto:
        return 0.5 * (w1**2 - q1), w1 * (pc.sum_w1 - w1)
    w2 = np.asarray(pc.region_sum_w2, float)
    return w1 * w2, w1 * pc.sum_w2 + pc.sum_w1 * w2 - 2.0 * w1 * w2


def _removed_norm(pc: PairCounts, k: int, cross_weight: float) -> float:
    """Weighted pair total removed when region k is deleted (cross pairs times the weight)."""
    if pc.region_pair_norm is not None:
        # counts summed over split random sets carry their exact delete-one totals; the
        # both/one proportions for a cross weight != 1 come from the summed weight sums,
        # which scale like the per-set ones (exact for cross_weight = 1)
        removed = pc.norm - float(pc.region_pair_norm[k])
        if cross_weight != 1.0:
            both, one = region_norms(pc)
            removed *= (both[k] + cross_weight * one[k]) / (both[k] + one[k])
        return removed
    both, one = region_norms(pc)
    return float(both[k] + cross_weight * one[k])


def normalised_counts(counts: Counts, delete_region: int | None = None,
                      cross_weight: float = 1.0) -> np.ndarray:
    """Weighted counts divided by the weighted number of pairs.

    Parameters
    ----------
    counts : PairCounts or sequence of PairCounts
        One count, or the counts of several independent random sets (split-random RR,
        Keihänen et al. 2019): their weighted counts and pair totals are summed, so pairs
        across sets are neither counted nor normalised.
    delete_region : int, optional
        Jackknife: remove region k. Pairs with both members in k are removed, and pairs with
        exactly one member in k are removed with weight ``cross_weight``. Counts without
        regions (e.g. the analytic RR of a periodic box) are returned unchanged, which is exact
        for a uniform box only in the limit of separations small against a region.
    cross_weight : float
        Weight of the one-member pairs removed (1 = standard delete-one jackknife).
    """
    total_w, total_n = 0.0, 0.0
    for pc in _as_list(counts):
        w, n = np.asarray(pc.weighted, dtype=np.float64), float(pc.norm)
        if delete_region is not None and pc.region_both is not None:
            k = int(delete_region)
            if not 0 <= k < pc.n_regions:
                raise InputError(f"jackknife region {k} out of range [0, {pc.n_regions})")
            w = w - pc.region_both[k] - cross_weight * pc.region_one[k]
            n = n - _removed_norm(pc, k, cross_weight)
        total_w = total_w + w
        total_n += n
    if not total_n > 0:
        raise InputError("pair counts have zero total weight (empty catalogue or region)")
    return total_w / total_n


def _safe_divide(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    den = np.asarray(den, dtype=np.float64)
    out = np.full(np.broadcast(num, den).shape, np.nan)
    np.divide(num, den, out=out, where=den > 0)
    return out


def landy_szalay(dd: np.ndarray, dr: np.ndarray, rr: np.ndarray) -> np.ndarray:
    """(DD - 2 DR + RR) / RR from normalised counts (Landy & Szalay 1993, eq. 48 [from memory]).

    Bins with RR = 0 give NaN.
    """
    return _safe_divide(dd - 2.0 * dr + rr, rr)


def peebles_hauser(dd: np.ndarray, rr: np.ndarray) -> np.ndarray:
    """DD / RR - 1, the natural estimator (Peebles & Hauser 1974)."""
    return _safe_divide(dd, rr) - 1.0


def davis_peebles(dd: np.ndarray, dr: np.ndarray) -> np.ndarray:
    """DD / DR - 1 (Davis & Peebles 1983)."""
    return _safe_divide(dd, dr) - 1.0


def hamilton(dd: np.ndarray, dr: np.ndarray, rr: np.ndarray) -> np.ndarray:
    """DD RR / DR^2 - 1 (Hamilton 1993)."""
    return _safe_divide(dd * rr, dr**2) - 1.0


def shifted_landy_szalay(dd: np.ndarray, ds: np.ndarray, ss: np.ndarray,
                         rr: np.ndarray) -> np.ndarray:
    """(DD - 2 DS + SS) / RR with shifted randoms S (Padmanabhan et al. 2012 [from memory])."""
    return _safe_divide(dd - 2.0 * ds + ss, rr)


def correlation(dd: Counts, rr: Counts, dr: Counts | None = None, *,
                ds: Counts | None = None, ss: Counts | None = None,
                estimator: str = "landy_szalay", delete_region: int | None = None,
                cross_weight: float = 1.0) -> np.ndarray:
    """xi from pair counts with the chosen estimator.

    Parameters
    ----------
    dd, rr, dr : PairCounts or sequence of PairCounts
        Data-data, random-random (a list for split randoms, or the analytic box RR), and
        data-random counts. ``dr`` may be None only for ``"peebles_hauser"``; with an analytic
        box RR, Landy–Szalay without DR reduces to it.
    ds, ss : PairCounts, optional
        Data-shifted and shifted-shifted counts after reconstruction; when both are given the
        shifted-random form (DD - 2DS + SS)/RR is used (R = unshifted randoms).
    estimator : {"landy_szalay", "peebles_hauser", "davis_peebles", "hamilton"}
    delete_region, cross_weight
        Jackknife sample, see :func:`normalised_counts`.
    """
    def norm(c):
        return normalised_counts(c, delete_region, cross_weight)

    if estimator not in ESTIMATORS:
        raise ConfigError(f"estimate.estimator = {estimator!r} is not one of "
                          f"{', '.join(ESTIMATORS)}")
    n_dd, n_rr = norm(dd), norm(rr)
    if ds is not None or ss is not None:
        if ds is None or ss is None:
            raise InputError("the shifted-random estimator needs both DS and SS counts")
        return shifted_landy_szalay(n_dd, norm(ds), norm(ss), n_rr)
    if estimator == "peebles_hauser":
        return peebles_hauser(n_dd, n_rr)
    if dr is None:
        periodic = _as_list(rr)[0].box_size is not None or _as_list(dd)[0].box_size is not None
        if estimator == "landy_szalay" and periodic:
            return peebles_hauser(n_dd, n_rr)  # periodic box: DR/RR -> 1 exactly
        raise InputError(f"estimator {estimator!r} needs DR counts; count data-random pairs "
                         "or use the peebles_hauser estimator with an analytic box RR")
    n_dr = norm(dr)
    if estimator == "landy_szalay":
        return landy_szalay(n_dd, n_dr, n_rr)
    if estimator == "davis_peebles":
        return davis_peebles(n_dd, n_dr)
    return hamilton(n_dd, n_dr, n_rr)


def _mu_convention(mu_edges: np.ndarray) -> float:
    """Return the Legendre prefactor scale: 1 for |mu| in [0, 1], 1/2 for signed [-1, 1]."""
    if np.isclose(mu_edges[0], 0.0) and np.isclose(mu_edges[-1], 1.0):
        return 1.0
    if np.isclose(mu_edges[0], -1.0) and np.isclose(mu_edges[-1], 1.0):
        return 0.5
    raise InputError(f"mu bins must cover [0, 1] or [-1, 1] for multipoles; got "
                     f"[{mu_edges[0]}, {mu_edges[-1]}]")


def _legendre_antiderivative(ell: int, x: np.ndarray) -> np.ndarray:
    """∫_0^x L_ell(t) dt: x for ell = 0, (L_{ell+1} - L_{ell-1}) / (2 ell + 1) otherwise."""
    if ell == 0:
        return np.asarray(x, dtype=np.float64)
    return (eval_legendre(ell + 1, x) - eval_legendre(ell - 1, x)) / (2 * ell + 1)


def legendre_bin_integrals(mu_edges, ell: int) -> np.ndarray:
    """Exact ∫ L_ell(mu) dmu over each mu bin, shape (n_mu,).

    Notes
    -----
    Uses (2l + 1) L_l = L'_{l+1} - L'_{l-1} (Abramowitz & Stegun 1964, 22.8.5 [from memory]).
    """
    edges = np.asarray(mu_edges, dtype=np.float64)
    return np.diff(_legendre_antiderivative(int(ell), edges))


def multipoles(xi_smu, mu_edges, ells: Sequence[int] = (0, 2, 4),
               method: str = "integrate") -> np.ndarray:
    """Legendre multipoles xi_l(s) of xi(s, mu) given in mu bins.

    Parameters
    ----------
    xi_smu : ndarray, shape (n_s, n_mu)
        Correlation function in (s, mu) bins.
    mu_edges : array_like, shape (n_mu + 1,)
        mu bin edges covering [0, 1] (|mu|) or [-1, 1] (signed mu).
    ells : sequence of int
        Multipole orders.
    method : {"integrate", "fit"}
        ``"integrate"``: xi_l = (2l + 1) Σ_b xi_b ∫_b L_l dmu for |mu| (factor (2l + 1)/2 for
        signed mu), i.e. xi taken as constant within each mu bin and the Legendre polynomial
        integrated exactly over the bin (no midpoint error). ``"fit"``: least-squares solution
        of xi_b = Σ_l xi_l <L_l>_b with bin-averaged Legendre polynomials, exact when xi has no
        multipoles beyond ``ells`` (e.g. the linear Kaiser form, Hamilton 1992); for signed mu
        odd orders must be included if present.

    Returns
    -------
    ndarray, shape (len(ells), n_s)
    """
    xi = np.asarray(xi_smu, dtype=np.float64)
    edges = np.asarray(mu_edges, dtype=np.float64)
    if xi.ndim != 2 or xi.shape[1] != edges.size - 1:
        raise InputError(f"xi(s, mu) has shape {xi.shape} but there are {edges.size - 1} mu "
                         "bins")
    scale = _mu_convention(edges)
    integrals = np.array([legendre_bin_integrals(edges, ell) for ell in ells])  # (n_l, n_mu)
    if method == "integrate":
        factors = np.array([(2 * ell + 1) * scale for ell in ells])[:, None]
        return factors * (integrals @ xi.T)
    if method == "fit":
        design = (integrals / np.diff(edges)[None, :]).T  # (n_mu, n_l) bin averages of L_l
        if design.shape[0] < design.shape[1]:
            raise InputError(f"{design.shape[0]} mu bins cannot fit {design.shape[1]} multipoles")
        coeffs, *_ = np.linalg.lstsq(design, xi.T, rcond=None)
        return coeffs
    raise ConfigError(f"estimate.multipole_method = {method!r} is not 'integrate' or 'fit'")


def wedges(xi_smu, mu_edges, wedge_edges: Sequence[tuple[float, float]]) -> np.ndarray:
    """Clustering wedges: xi averaged over |mu| in each range.

    Parameters
    ----------
    xi_smu : ndarray, shape (n_s, n_mu)
    mu_edges : array_like, shape (n_mu + 1,)
        |mu| or signed mu edges.
    wedge_edges : sequence of (mu_lo, mu_hi)
        |mu| ranges within [0, 1], any values: a mu bin cut by a wedge edge contributes the
        fraction of its width inside (xi taken as constant within a bin). With signed mu bins
        both [mu_lo, mu_hi] and [-mu_hi, -mu_lo] are averaged.

    Returns
    -------
    ndarray, shape (n_wedges, n_s)

    Notes
    -----
    xi_w(s) = ∫_w xi(s, mu) dmu / Δmu_w (Kazin, Sánchez & Blanton 2012 [from memory]).
    """
    xi = np.asarray(xi_smu, dtype=np.float64)
    edges = np.asarray(mu_edges, dtype=np.float64)
    if xi.ndim != 2 or xi.shape[1] != edges.size - 1:
        raise InputError(f"xi(s, mu) has shape {xi.shape} but there are {edges.size - 1} mu "
                         "bins")
    signed = _mu_convention(edges) == 0.5
    lo_e, hi_e = edges[:-1], edges[1:]
    out = []
    for i, pair in enumerate(wedge_edges):
        try:
            a, b = (float(v) for v in pair)
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"estimate.wedges[{i}] = {pair!r} is not a pair of numbers") \
                from exc
        if not 0.0 <= a < b <= 1.0:
            raise ConfigError(f"estimate.wedges[{i}] = [{a}, {b}] must satisfy "
                              "0 <= mu_lo < mu_hi <= 1")
        ranges = [(a, b)] + ([(-b, -a)] if signed else [])
        overlap = sum(np.clip(np.minimum(hi_e, hi) - np.maximum(lo_e, lo), 0, None)
                      for lo, hi in ranges)
        out.append(xi @ overlap / overlap.sum())
    return np.array(out)


def projected(xi_rppi, pi_edges, pi_max: float | None = None) -> np.ndarray:
    """Projected correlation function w_p(r_p) = ∫_{-pi_max}^{pi_max} xi(r_p, pi) dpi, Mpc/h.

    Parameters
    ----------
    xi_rppi : ndarray, shape (n_rp, n_pi)
    pi_edges : array_like, shape (n_pi + 1,)
        Line-of-sight edges in Mpc/h: non-negative (|pi|, the integral is doubled) or signed.
    pi_max : float, optional
        Upper limit of the integral in Mpc/h; must be one of the edges (default: last edge).

    Notes
    -----
    Davis & Peebles (1983), eq. for w_p [from memory]; xi taken as constant within pi bins.
    """
    xi = np.asarray(xi_rppi, dtype=np.float64)
    edges = np.asarray(pi_edges, dtype=np.float64)
    if xi.ndim != 2 or xi.shape[1] != edges.size - 1:
        raise InputError(f"xi(r_p, pi) has shape {xi.shape} but there are {edges.size - 1} "
                         "pi bins")
    top = edges[-1] if pi_max is None else float(pi_max)
    if not np.any(np.isclose(edges, top)):
        raise ConfigError(f"estimate.pi_max = {top} Mpc/h must equal a pi bin edge; edges are "
                          f"{edges.tolist()}")
    use = (edges[1:] <= top + 1e-9) & (edges[:-1] >= -top - 1e-9)
    factor = 2.0 if edges[0] >= 0 else 1.0
    return factor * (xi[:, use] @ np.diff(edges)[use])


def _merge_index(old: np.ndarray, new, axis_name: str) -> np.ndarray:
    """Indices in ``old`` of the edges kept by ``new`` (edges or an integer factor)."""
    n_old = old.size - 1
    if isinstance(new, (int, np.integer)):
        factor = int(new)
        if factor < 1 or n_old % factor:
            raise ConfigError(f"cannot merge {n_old} {axis_name} bins by {factor}: the factor "
                              "must divide the number of bins")
        return np.arange(0, old.size, factor)
    new = np.asarray(new, dtype=np.float64)
    idx = np.searchsorted(old, new)
    idx = np.clip(idx, 0, old.size - 1)
    if np.any(~np.isclose(old[idx], new, rtol=0, atol=1e-9 * max(1.0, abs(old).max()))):
        raise ConfigError(f"new {axis_name} edges {new.tolist()} are not a subset of the "
                          f"stored edges {old.tolist()}; rebinning cannot split bins")
    if new.size < 2 or np.any(np.diff(idx) <= 0):
        raise ConfigError(f"new {axis_name} edges must increase and give at least one bin")
    return idx


def _merge(array, axis_offset: int, idx_list) -> np.ndarray | None:
    """Sum ``array`` over groups of adjacent bins; ``idx_list[ax]`` holds the kept edge indices."""
    if array is None:
        return None
    out = np.asarray(array)
    for ax, idx in enumerate(idx_list):
        if idx is None:
            continue
        axis = ax + axis_offset
        part = np.take(out, np.arange(idx[0], idx[-1]), axis=axis)
        out = np.add.reduceat(part, idx[:-1] - idx[0], axis=axis)
    return out


def rebin_counts(pc: PairCounts, first=None, second=None) -> PairCounts:
    """Merge stored pair-count bins without recounting.

    Parameters
    ----------
    pc : PairCounts
    first : int or array_like, optional
        New edges of the first axis (s or r_p) chosen among the stored edges, or an integer
        number of adjacent bins to merge. Bins outside the new range are dropped.
    second : int or array_like, optional
        The same for the second axis (mu or pi).

    Returns
    -------
    PairCounts
        With summed weighted, raw and per-region counts; weight sums are unchanged, so
        normalisations are unchanged.
    """
    if second is not None and len(pc.edges) < 2:
        raise ConfigError("these counts have one axis; only the separation can be rebinned")
    idx = []
    new_edges = []
    for axis, new in enumerate((first, second)[:len(pc.edges)]):
        old = np.asarray(pc.edges[axis], dtype=np.float64)
        if new is None:
            idx.append(None)
            new_edges.append(old)
            continue
        i = _merge_index(old, new, ("separation", "mu/pi")[axis])
        idx.append(i)
        new_edges.append(old[i])
    return dataclasses.replace(
        pc,
        edges=tuple(new_edges),
        weighted=_merge(pc.weighted, 0, idx),
        raw=_merge(pc.raw, 0, idx),
        region_both=_merge(pc.region_both, 1, idx),
        region_one=_merge(pc.region_one, 1, idx),
    )


def _rebin_all(counts: Counts, first, second) -> Counts:
    if first == 1 and second == 1:
        return counts
    f = None if first == 1 else int(first)
    g = None if second == 1 else int(second)
    if isinstance(counts, PairCounts):
        return rebin_counts(counts, f, g)
    return [rebin_counts(c, f, g) for c in counts]


def _first(counts: Counts) -> PairCounts:
    return _as_list(counts)[0]


@dataclass(frozen=True, eq=False)
class Estimate:
    """Correlation function of one analysis and its projections.

    Attributes
    ----------
    estimator : str
    s_edges, mu_edges : ndarray
        Separation (Mpc/h) and mu bin edges of ``xi_smu``.
    xi_smu : ndarray, shape (n_s, n_mu)
    ells : tuple of int
    multipoles : ndarray, shape (n_ells, n_s)
    wedge_edges : ndarray, shape (n_wedges, 2)
    wedges : ndarray, shape (n_wedges, n_s)
    rp_edges, pi_edges : ndarray or None
        (r_p, pi) edges in Mpc/h when projected counts were given.
    xi_rppi : ndarray, shape (n_rp, n_pi), or None
    wp : ndarray, shape (n_rp,), or None
        w_p(r_p) in Mpc/h up to ``pi_max``.
    pi_max : float or None
    """

    estimator: str
    s_edges: np.ndarray
    mu_edges: np.ndarray
    xi_smu: np.ndarray
    ells: tuple
    multipoles: np.ndarray
    wedge_edges: np.ndarray
    wedges: np.ndarray
    rp_edges: np.ndarray | None = None
    pi_edges: np.ndarray | None = None
    xi_rppi: np.ndarray | None = None
    wp: np.ndarray | None = None
    pi_max: float | None = None

    @property
    def s(self) -> np.ndarray:
        """Volume-weighted mean separation of each s bin, 3/4 (b^4 - a^4)/(b^3 - a^3), Mpc/h."""
        a, b = self.s_edges[:-1], self.s_edges[1:]
        return 0.75 * (b**4 - a**4) / (b**3 - a**3)

    def vector(self, kind: str = "multipoles") -> np.ndarray:
        """Flattened estimator vector: "multipoles" [xi_l0(s..), xi_l1(s..), ...], "wedges",
        or "wp"."""
        if kind == "multipoles":
            return self.multipoles.ravel()
        if kind == "wedges":
            return self.wedges.ravel()
        if kind == "wp":
            if self.wp is None:
                raise InputError("no w_p: count pairs in (r_p, pi) (counts.projected = true)")
            return np.asarray(self.wp)
        raise ConfigError(f"estimator vector {kind!r} is not 'multipoles', 'wedges' or 'wp'")

    def to_hdf5_group(self, group) -> None:
        """Store in an h5py group (arrays as datasets; estimator, ells, pi_max as attributes)."""
        for name in ("s_edges", "mu_edges", "xi_smu", "multipoles", "wedge_edges", "wedges",
                     "rp_edges", "pi_edges", "xi_rppi", "wp"):
            value = getattr(self, name)
            if value is not None:
                group.create_dataset(name, data=np.asarray(value))
        group.create_dataset("s", data=self.s)
        group.attrs["estimator"] = self.estimator
        group.attrs["ells"] = np.asarray(self.ells, dtype=np.int64)
        if self.pi_max is not None:
            group.attrs["pi_max"] = float(self.pi_max)

    @classmethod
    def from_hdf5_group(cls, group) -> "Estimate":
        """Read what :meth:`to_hdf5_group` wrote."""
        def get(name):
            return np.asarray(group[name][()]) if name in group else None

        return cls(str(group.attrs["estimator"]), get("s_edges"), get("mu_edges"),
                   get("xi_smu"), tuple(int(e) for e in group.attrs["ells"]), get("multipoles"),
                   get("wedge_edges"), get("wedges"), get("rp_edges"), get("pi_edges"),
                   get("xi_rppi"), get("wp"),
                   float(group.attrs["pi_max"]) if "pi_max" in group.attrs else None)


def _xi_of(counts, estimator, delete_region, cross_weight) -> np.ndarray:
    missing = [k for k in ("DD", "RR") if k not in counts]
    if missing:
        raise InputError(f"pair counts {missing} are missing; the counts stage must store DD "
                         "and RR (and DR for survey data)")
    return correlation(counts["DD"], counts["RR"], counts.get("DR"), ds=counts.get("DS"),
                       ss=counts.get("SS"), estimator=estimator, delete_region=delete_region,
                       cross_weight=cross_weight)


def estimate_from_counts(counts, settings: "EstimateSettings", rppi_counts=None, *,
                         delete_region: int | None = None,
                         cross_weight: float = 1.0) -> Estimate:
    """xi(s, mu), multipoles, wedges [and w_p] from stored pair counts.

    Parameters
    ----------
    counts : mapping
        ``{"DD", "RR"[, "DR"][, "DS", "SS"]}`` -> PairCounts (RR may be a list of split sets)
        in (s, mu) bins.
    settings : EstimateSettings
        Estimator, multipoles, wedges, pi_max and the s/mu merging factors.
    rppi_counts : mapping, optional
        The same counts in (r_p, pi) bins, for w_p.
    delete_region, cross_weight
        Jackknife sample (see :func:`normalised_counts`).
    """
    merged = {k: _rebin_all(v, settings.s_merge, settings.mu_merge) for k, v in counts.items()}
    dd = _first(merged["DD"]) if "DD" in merged else None
    if dd is None or dd.mode != "smu":
        raise InputError("estimate needs (s, mu) pair counts (mode 'smu') under 'DD'")
    s_edges, mu_edges = (np.asarray(e, dtype=np.float64) for e in dd.edges)
    xi = _xi_of(merged, settings.estimator, delete_region, cross_weight)
    poles = multipoles(xi, mu_edges, settings.ells, method=settings.multipole_method)
    wedge_edges = np.asarray(settings.wedges, dtype=np.float64).reshape(-1, 2)
    wdg = wedges(xi, mu_edges, settings.wedges) if len(settings.wedges) else \
        np.zeros((0, xi.shape[0]))
    extra = {}
    if rppi_counts is not None:
        xi_p = _xi_of(rppi_counts, settings.estimator, delete_region, cross_weight)
        rp_edges, pi_edges = (np.asarray(e, dtype=np.float64)
                              for e in _first(rppi_counts["DD"]).edges)
        top = min(float(settings.pi_max), float(pi_edges[-1]))
        extra = dict(rp_edges=rp_edges, pi_edges=pi_edges, xi_rppi=xi_p,
                     wp=projected(xi_p, pi_edges, top), pi_max=top)
    return Estimate(settings.estimator, s_edges, mu_edges, xi, tuple(settings.ells), poles,
                    wedge_edges, wdg, **extra)


@dataclass(frozen=True)
class EstimateSettings:
    """Config section ``[estimate]``: estimator and projections."""

    estimator: str = setting("landy_szalay", "correlation-function estimator",
                             choices=ESTIMATORS)
    ells: tuple[int, ...] = setting((0, 2, 4), "Legendre multipole orders", low=0, high=8)
    multipole_method: str = setting("integrate", "mu integration of the multipoles: exact "
                                    "Legendre integrals over bins, or a band-limited fit",
                                    choices=("integrate", "fit"))
    wedges: tuple[tuple[float, float], ...] = setting(
        ((0.0, 0.5), (0.5, 1.0)), "clustering wedges as |mu| ranges", low=0.0, high=1.0)
    pi_max: float = setting(80.0, "upper limit of the line-of-sight integral of w_p",
                            unit="Mpc/h", low=0.0, low_open=True)
    s_merge: int = setting(1, "merge this many adjacent stored s bins before estimating",
                           low=1)
    mu_merge: int = setting(1, "merge this many adjacent stored mu bins before estimating",
                            low=1)

    def validate(self) -> None:
        """Cross-field checks run when the config is loaded."""
        if len(set(self.ells)) != len(self.ells) or not self.ells:
            raise ConfigError(f"estimate.ells = {list(self.ells)} must list distinct orders")
        for i, (lo, hi) in enumerate(self.wedges):
            if not lo < hi:
                raise ConfigError(f"estimate.wedges[{i}] = [{lo}, {hi}] needs mu_lo < mu_hi")
