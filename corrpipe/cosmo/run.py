"""One expansion-history fit from settings: data vector, overlap checks, likelihood, chain."""

from __future__ import annotations

from pathlib import Path
from typing import Mapping, Sequence

from corrpipe.cosmo.data import (BinSamples, combine, cross_from_mocks, read_cross_covariance,
                                 read_external)
from corrpipe.cosmo.density import SampleDensity
from corrpipe.cosmo.infer import sample_posterior
from corrpipe.cosmo.likelihood import DistanceLikelihood
from corrpipe.cosmo.result import CosmologyResult
from corrpipe.cosmo.settings import ExpansionSettings
from corrpipe.errors import InputError

__all__ = ["overlapping_bins", "build_likelihood", "fit_expansion"]


def overlapping_bins(ranges: Mapping[str, tuple[float, float | None]]
                     ) -> list[tuple[str, str]]:
    """Pairs of bins whose redshift ranges [z_min, z_max) overlap (None: no upper cut)."""
    names = list(ranges)
    out = []
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            lo_a, hi_a = ranges[a]
            lo_b, hi_b = ranges[b]
            hi_a = float("inf") if hi_a is None else hi_a
            hi_b = float("inf") if hi_b is None else hi_b
            if lo_a < hi_b and lo_b < hi_a:
                out.append((a, b))
    return out


def build_likelihood(settings: ExpansionSettings, bins: Sequence[BinSamples],
                     ranges: Mapping[str, tuple[float, float | None]] | None = None
                     ) -> tuple[DistanceLikelihood, list[str]]:
    """The likelihood of the bins' distances plus the external files, and notes about them.

    Parameters
    ----------
    settings : ExpansionSettings
    bins : sequence of BinSamples
        The analysed bins (posterior samples of their distance ratios).
    ranges : mapping, optional
        Redshift range of each bin's galaxies, for the overlap check.

    Raises
    ------
    InputError
        Overlapping bins without a cross-covariance (or an explicit ``independent = true``),
        duplicate measurements, bad files, redshifts outside the models' range.
    """
    notes = [n for b in bins for n in b.notes]
    overlaps = overlapping_bins(ranges or {})
    has_cross = bool(settings.cross_covariance or settings.mock_distances)
    if overlaps and not has_cross and not settings.independent:
        a, b = overlaps[0]
        (lo_a, hi_a), (lo_b, hi_b) = ranges[a], ranges[b]
        raise InputError(
            f"analyses '{a}' (z {lo_a:g}-{hi_a if hi_a is not None else 'inf'}) and '{b}' "
            f"(z {lo_b:g}-{hi_b if hi_b is not None else 'inf'}) overlap in redshift, so their "
            "distances are correlated; give [expansion] cross_covariance or mock_distances, or "
            "set independent = true if they share no galaxies (e.g. separate sky regions)")
    if overlaps and settings.independent and not has_cross:
        notes.append("bins " + ", ".join(f"{a}/{b}" for a, b in overlaps)
                     + " overlap in redshift and were declared independent")
    parts = [b.data_vector() for b in bins]
    parts += [read_external(p) for p in settings.external]
    if not parts:
        raise InputError("the expansion fit has no data: no analysed bins and no external "
                         "files ([expansion] analyses, external)")
    data = combine(parts)
    cross = []
    if settings.cross_covariance:
        cross += read_cross_covariance(settings.cross_covariance)
    if settings.mock_distances:
        cross += cross_from_mocks(settings.mock_distances, data)
    if cross:
        data = combine(parts, cross)
    densities = {}
    if settings.likelihood == "chain-density":
        densities = {b.label: SampleDensity(b.samples) for b in bins}
    return DistanceLikelihood(settings.space(), data, densities), notes


def fit_expansion(settings: ExpansionSettings, bins: Sequence[BinSamples],
                  ranges: Mapping[str, tuple[float, float | None]] | None = None, *,
                  progress_path: str | Path | None = None, seed: int = 1,
                  progress: bool = True) -> CosmologyResult:
    """Fit the configured expansion-history model to the bins and external measurements.

    See :func:`build_likelihood` for the inputs and errors; sampling as
    :func:`corrpipe.cosmo.infer.sample_posterior` (resumable through ``progress_path``).
    """
    like, notes = build_likelihood(settings, bins, ranges)
    return sample_posterior(like, n_walkers=settings.n_walkers, seed=seed,
                            progress_path=progress_path, max_steps=settings.max_steps,
                            check_every=settings.check_every, tau_factor=settings.tau_factor,
                            progress=progress, likelihood=settings.likelihood, notes=notes)
