"""BAO template fitting: likelihood, sampling and summaries."""

from corrpipe.fit.external import ExternalMultipoles, load_external_multipoles
from corrpipe.fit.likelihood import Likelihood
from corrpipe.fit.result import FitResult
from corrpipe.fit.run import build_likelihood, build_linear_power, fit_multipoles
from corrpipe.fit.settings import FitSettings

__all__ = ["FitSettings", "Likelihood", "FitResult", "fit_multipoles", "build_likelihood",
           "build_linear_power", "load_external_multipoles", "ExternalMultipoles"]
