"""Line-interloper populations for box mocks: their own clustered boxes, moved to the frame
their misread line assigns them, mixed into the target sample.

Each population (a line, a number fraction of the final sample and a linear bias) is drawn
with the box generators (:func:`lognormal_box`, :func:`zeldovich_box`) from the linear power,
growth rate and bias at *its true redshift*, with its own redshift-space distortions. Its
positions are then those of the assigned frame: the line mapping stretches separations by
gamma_perp across and gamma_par along the line of sight
(:func:`corrpipe.theory.interlopers.line_mapping`, evaluated at the box redshift). The
generators draw the field directly in the stretched coordinates (the same machinery that
injects a dilation, with alpha = 1 / gamma), which is the interloper box of sides
L / gamma_perp, L / gamma_perp, L / gamma_par in its own frame with every position multiplied
by gamma: the result is a periodic cube of side L in the target frame, so it mixes with the
target box and keeps the analytic RR.

The target population is drawn at density (1 - sum f) nbar and population k at f_k nbar, so
the mixed catalogue has the requested fractions in expectation; the realised fractions are
recorded.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from corrpipe.errors import InputError
from corrpipe.mocks.box import BoxMock, lognormal_box, zeldovich_box
from corrpipe.mocks.settings import InterloperPopulation, populations_of
from corrpipe.theory.interlopers import LineMapping

__all__ = ["InterloperPopulation", "populations_of", "interloper_box", "MixedBox",
           "mix_box"]

def interloper_box(power_true, mapping: LineMapping, box_size: float, n_mesh: int,
                   nbar: float, bias: float, growth_rate: float, seed, *, kind: str = "lognormal",
                   alpha_par: float = 1.0, alpha_perp: float = 1.0, los_axis: int = 2,
                   dtype=np.float64, progress: bool = False, **kwargs: Any) -> BoxMock:
    """Clustered box of one interloper population, in the target (assigned) frame.

    Parameters
    ----------
    power_true : callable
        Linear matter power at the population's true redshift, k [h/Mpc] -> P [(Mpc/h)^3].
    mapping : LineMapping
        Line mapping at the box redshift (scalar).
    box_size : float
        Side of the target-frame cube, Mpc/h.
    n_mesh : int
        Mesh nodes per side (target frame).
    nbar : float
        Density of this population in the target frame, (h/Mpc)^3.
    bias, growth_rate : float
        Linear bias and growth rate at the true redshift.
    seed : int or Generator
        Randomness.
    kind : {"lognormal", "zeldovich"}
        Generator.
    alpha_par, alpha_perp : float
        Any dilation injected into the target box as well (the interloper box gets
        alpha / gamma).
    los_axis : int
        Line-of-sight axis.
    dtype, progress, **kwargs
        Passed to the generator.

    Returns
    -------
    BoxMock
        Positions and displacements in the target frame; ``meta`` records the mapping.
    """
    a_par = alpha_par / float(mapping.gamma_par)
    a_perp = alpha_perp / float(mapping.gamma_perp)
    if not (0.5 <= a_par <= 2.0 and 0.5 <= a_perp <= 2.0):
        raise InputError(
            f"interloper line at {float(mapping.interloper_wavelength):g} A stretches the box by "
            f"gamma_par = {float(mapping.gamma_par):.3f}, gamma_perp = "
            f"{float(mapping.gamma_perp):.3f}: box mocks handle stretches between 0.5 and 2 "
            "only (the interloper mesh would be too anisotropic); choose lines closer in "
            "wavelength")
    gen = lognormal_box if kind == "lognormal" else zeldovich_box
    box = gen(power_true, box_size, n_mesh, nbar, bias, growth_rate, seed, alpha_par=a_par,
              alpha_perp=a_perp, los_axis=los_axis, dtype=dtype, progress=progress, **kwargs)
    meta = dict(box.meta, mapping=mapping.as_dict())
    return BoxMock(positions=box.positions, displacement=box.displacement,
                   box_size=box.box_size, growth_rate=box.growth_rate, bias=box.bias,
                   nbar=box.nbar, kind=box.kind, alpha_par=a_par, alpha_perp=a_perp,
                   los_axis=box.los_axis, seed=box.seed, meta=meta)


@dataclass(frozen=True)
class MixedBox:
    """A target box with interloper populations mixed in (redshift-space positions).

    Attributes
    ----------
    positions : ndarray, shape (N, 3)
        All objects, Mpc/h, in [0, box_size).
    population : ndarray of int8, shape (N,)
        0 for the target line, k for interloper population k (1-based).
    fractions : tuple of float
        Realised share of each interloper population.
    requested : tuple of float
        Requested shares.
    mappings : tuple of dict
        Line mapping of each population.
    target : BoxMock or None
        The target population's box.
    """

    positions: np.ndarray
    population: np.ndarray
    fractions: tuple
    requested: tuple
    mappings: tuple
    target: BoxMock | None = None

    def truth(self) -> dict:
        """JSON-ready record for the truth file."""
        return {"fractions_requested": list(self.requested),
                "fractions_realised": list(self.fractions),
                "n_per_population": np.bincount(self.population,
                                                minlength=len(self.requested) + 1).tolist(),
                "mappings": list(self.mappings)}


def mix_box(target: BoxMock, interlopers, requested, rsd: bool = True) -> MixedBox:
    """Concatenate a target box and interloper boxes (all in the target frame).

    Parameters
    ----------
    target : BoxMock
        The target population (drawn at density (1 - sum f) nbar).
    interlopers : sequence of BoxMock
        One box per population, from :func:`interloper_box`.
    requested : sequence of float
        Requested fraction of each population.
    rsd : bool
        Use redshift-space positions (each population with its own growth rate).
    """
    boxes = [target, *interlopers]
    for b in interlopers:
        if b.box_size != target.box_size or b.los_axis != target.los_axis:
            raise InputError("interloper boxes must share the target box's size and line of "
                             "sight")
    pos = [b.redshift_space_positions() if rsd else b.positions for b in boxes]
    label = np.concatenate([np.full(len(b), k, dtype=np.int8) for k, b in enumerate(boxes)])
    n_total = max(1, label.size)
    fractions = tuple(float(np.sum(label == k)) / n_total for k in range(1, len(boxes)))
    return MixedBox(positions=np.concatenate(pos), population=label, fractions=fractions,
                    requested=tuple(float(f) for f in requested),
                    mappings=tuple(b.meta.get("mapping", {}) for b in interlopers),
                    target=target)
