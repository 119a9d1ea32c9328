"""BAO reconstruction: estimate the linear displacement from the galaxy field and undo it.

The galaxy overdensity is painted on a mesh, smoothed with a Gaussian, and the Zel'dovich
displacement psi is solved from

    div psi + beta div[(psi . r_hat) r_hat] = -delta / b,        beta = f / b,

(Padmanabhan et al. 2012). In a periodic box with a fixed line of sight the equation is
diagonal in Fourier space and is solved exactly; for a survey (observer at the origin, radial
line of sight) it is solved iteratively in Fourier space, treating the radial term with the
previous iterate (the scheme of Burden, Percival & Howlett 2015 [from memory]), with the over-relaxation
described in :func:`survey_displacement`. Data are then moved by ``-[psi + f (psi . r) r]``
and randoms by ``-psi`` ("remove-rsd") or ``-[psi + f (psi . r) r]`` ("keep-rsd"); the
estimator is (DD - 2DS + SS)/RR with the unshifted randoms for RR.

Units: positions, lengths and displacements in Mpc/h; the observer of a survey sits at the
origin. Meshes are float64 or float32 (``precision``); a 512^3 float64 mesh takes 1 GiB.
"""

from corrpipe.recon.drivers import reconstruct_box, reconstruct_survey
from corrpipe.recon.settings import (CONVENTIONS, MeshGeometry, ReconResult, ReconSettings,
                                     memory_estimate, resolve_growth_rate)
from corrpipe.recon.solver import (box_displacement, box_geometry, equation_residual,
                                   survey_density_contrast, survey_displacement,
                                   survey_geometry)

__all__ = [
    "CONVENTIONS",
    "ReconSettings",
    "MeshGeometry",
    "ReconResult",
    "survey_geometry",
    "box_geometry",
    "survey_density_contrast",
    "box_displacement",
    "survey_displacement",
    "equation_residual",
    "reconstruct_box",
    "reconstruct_survey",
    "resolve_growth_rate",
    "memory_estimate",
]
