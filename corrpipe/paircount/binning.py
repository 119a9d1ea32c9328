"""Bin definitions for pair counts: isotropic s, (s, mu) and (r_p, pi).

A pair with separation vector d (|d| = s) falls in s bin k when
``s_edges[k]**2 <= s**2 < s_edges[k+1]**2`` (squared distances are compared, so the rule is
exact and cheap). For mu the rule is ``mu_edges[k] <= mu < mu_edges[k+1]``, with mu equal to
the last edge put in the last bin; the same holds for r_p and pi.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from corrpipe.errors import ConfigError

__all__ = ["Binning", "MODES", "MU_RANGES"]

MODES = ("s", "smu", "rppi")
MU_RANGES = ("absolute", "signed")


def _as_edges(values, name: str) -> np.ndarray:
    try:
        edges = np.asarray(values, dtype=np.float64).ravel()
    except (TypeError, ValueError) as exc:
        message = f"{name} must be a list of numbers (bin edges), got {values!r}"
        raise ConfigError(message) from exc
    if edges.size < 2:
        raise ConfigError(f"{name} needs at least two edges (one bin), got {edges.size}")
    if not np.all(np.isfinite(edges)):
        raise ConfigError(f"{name} contains a non-finite value: {edges.tolist()}")
    if np.any(np.diff(edges) <= 0):
        raise ConfigError(f"{name} must increase strictly, got {edges.tolist()}")
    return edges


@dataclass(frozen=True, eq=False)
class Binning:
    """Bins of a pair count.

    Parameters
    ----------
    mode : {"s", "smu", "rppi"}
        Isotropic separation; separation and cosine to the line of sight; or separation
        perpendicular (r_p) and parallel (pi) to the line of sight.
    edges : tuple of ndarray
        ``(s_edges,)`` for "s", ``(s_edges, mu_edges)`` for "smu", ``(rp_edges, pi_edges)`` for
        "rppi". Separations in Mpc/h, mu dimensionless.
    mu_range : {"absolute", "signed"}
        For "smu": bin |mu| over [0, 1] or signed mu over [-1, 1].

    Notes
    -----
    Build it with :meth:`linear`, :meth:`log` or :meth:`from_edges` rather than directly.
    """

    mode: str
    edges: tuple
    mu_range: str = "absolute"

    def __post_init__(self) -> None:
        if self.mode not in MODES:
            raise ConfigError(f"binning mode must be one of {MODES}, got {self.mode!r}")
        if self.mu_range not in MU_RANGES:
            raise ConfigError(f"mu_range must be one of {MU_RANGES}, got {self.mu_range!r}")
        n_axes = 1 if self.mode == "s" else 2
        if len(self.edges) != n_axes:
            raise ConfigError(
                f"binning mode {self.mode!r} takes {n_axes} edge array(s), got {len(self.edges)}"
            )
        names = {"s": ("s_edges",), "smu": ("s_edges", "mu_edges"),
                 "rppi": ("rp_edges", "pi_edges")}[self.mode]
        edges = tuple(_as_edges(e, n) for e, n in zip(self.edges, names))
        if edges[0][0] < 0:
            raise ConfigError(f"{names[0]} must start at 0 or above, got {edges[0][0]}")
        if self.mode == "smu":
            lo = 0.0 if self.mu_range == "absolute" else -1.0
            mu = edges[1]
            if mu[0] < lo or mu[-1] > 1.0:
                raise ConfigError(
                    f"mu_edges must lie in [{lo:g}, 1] for mu_range={self.mu_range!r}, "
                    f"got [{mu[0]:g}, {mu[-1]:g}]"
                )
        if self.mode == "rppi" and edges[1][0] < 0:
            raise ConfigError(f"pi_edges bin |pi| and must start at 0 or above, got {edges[1][0]}")
        object.__setattr__(self, "edges", edges)

    # ------------------------------------------------------------------ builders
    @classmethod
    def from_edges(cls, s_edges, mu_edges=None, *, mode: str | None = None,
                   pi_edges=None, mu_range: str = "absolute") -> "Binning":
        """Binning from explicit edges (Mpc/h for separations).

        ``mode`` defaults to "smu" when ``mu_edges`` is given, "rppi" when ``pi_edges`` is given
        (then ``s_edges`` are the r_p edges) and "s" otherwise.
        """
        if mode is None:
            mode = "smu" if mu_edges is not None else ("rppi" if pi_edges is not None else "s")
        if mode == "s":
            return cls("s", (s_edges,))
        if mode == "smu":
            if mu_edges is None:
                raise ConfigError("mode 'smu' needs mu_edges")
            return cls("smu", (s_edges, mu_edges), mu_range)
        if pi_edges is None:
            raise ConfigError("mode 'rppi' needs pi_edges")
        return cls("rppi", (s_edges, pi_edges))

    @classmethod
    def linear(cls, s_min: float, s_max: float, n_s: int, *, n_mu: int | None = None,
               mu_range: str = "absolute", pi_max: float | None = None,
               n_pi: int | None = None) -> "Binning":
        """Linear separation bins.

        Parameters
        ----------
        s_min, s_max : float
            Range of s (or of r_p when ``pi_max`` is given), Mpc/h.
        n_s : int
            Number of separation bins.
        n_mu : int, optional
            Number of uniform mu bins; gives an (s, mu) binning.
        mu_range : {"absolute", "signed"}
            mu over [0, 1] or [-1, 1].
        pi_max : float, optional
            Maximum |pi| in Mpc/h; gives an (r_p, pi) binning with ``n_pi`` uniform pi bins
            (default one bin per Mpc/h).
        """
        s_edges = np.linspace(s_min, s_max, _count(n_s, "n_s") + 1)
        return cls._with_second_axis(s_edges, n_mu, mu_range, pi_max, n_pi)

    @classmethod
    def log(cls, s_min: float, s_max: float, n_s: int, *, n_mu: int | None = None,
            mu_range: str = "absolute", pi_max: float | None = None,
            n_pi: int | None = None) -> "Binning":
        """Logarithmic separation bins (``s_min`` > 0, Mpc/h); other arguments as :meth:`linear`."""
        if not s_min > 0:
            raise ConfigError(f"logarithmic bins need s_min > 0, got {s_min}")
        s_edges = np.geomspace(s_min, s_max, _count(n_s, "n_s") + 1)
        return cls._with_second_axis(s_edges, n_mu, mu_range, pi_max, n_pi)

    @classmethod
    def _with_second_axis(cls, s_edges, n_mu, mu_range, pi_max, n_pi) -> "Binning":
        if n_mu is not None and pi_max is not None:
            raise ConfigError("give either n_mu (for (s, mu) bins) or pi_max (for (r_p, pi)), not both")
        if n_mu is not None:
            lo = 0.0 if mu_range == "absolute" else -1.0
            return cls("smu", (s_edges, np.linspace(lo, 1.0, _count(n_mu, "n_mu") + 1)), mu_range)
        if pi_max is not None:
            if not pi_max > 0:
                raise ConfigError(f"pi_max must be positive (Mpc/h), got {pi_max}")
            n = _count(n_pi if n_pi is not None else max(1, int(round(pi_max))), "n_pi")
            return cls("rppi", (s_edges, np.linspace(0.0, pi_max, n + 1)))
        return cls("s", (s_edges,))

    # ------------------------------------------------------------------ properties
    @property
    def shape(self) -> tuple:
        """Histogram shape: number of bins along each axis."""
        return tuple(e.size - 1 for e in self.edges)

    @property
    def search_radius(self) -> float:
        """Largest 3-D separation (Mpc/h) a counted pair can have."""
        if self.mode == "rppi":
            return float(np.hypot(self.edges[0][-1], self.edges[1][-1]))
        return float(self.edges[0][-1])

    @property
    def min_radius(self) -> float:
        """Smallest 3-D separation (Mpc/h) a counted pair can have."""
        if self.mode == "rppi":
            return float(np.hypot(self.edges[0][0], self.edges[1][0]))
        return float(self.edges[0][0])

    def describe(self) -> dict:
        """Plain description for fingerprints and file attributes."""
        return {"mode": self.mode, "mu_range": self.mu_range,
                "edges": [e.tolist() for e in self.edges]}

    def __eq__(self, other) -> bool:
        return (isinstance(other, Binning) and self.mode == other.mode
                and self.mu_range == other.mu_range
                and all(np.array_equal(a, b) for a, b in zip(self.edges, other.edges)))

    def __hash__(self) -> int:
        return hash((self.mode, self.mu_range, tuple(tuple(e.tolist()) for e in self.edges)))


def _count(n, name: str) -> int:
    if isinstance(n, bool) or int(n) != n or int(n) < 1:
        raise ConfigError(f"{name} must be a positive integer, got {n!r}")
    return int(n)
