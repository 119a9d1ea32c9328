"""Expansion-history inference from BAO distances: flat ΛCDM, wCDM and w0waCDM (each with
optional curvature) fitted to D_M/r_d, D_H/r_d and D_V/r_d of several redshift bins and of
external measurement files.

Modules: ``models`` (distances, checked against astropy.cosmology), ``data`` (data vector,
files, cross-covariances, checks), ``density`` (exact per-bin likelihood from stored chains),
``priors`` (sampled parameters, flat and Gaussian priors, r_d fitting formula),
``likelihood``, ``fisher``, ``infer`` (best fit and emcee chain), ``result``
(constraints.json and the HDF5 chain), ``plots``.
"""

from corrpipe.cosmo.data import (QUANTITIES, BinSamples, DataVector, Measurement, bin_from_fit,
                                 combine, cross_from_mocks, read_cross_covariance,
                                 read_external)
from corrpipe.cosmo.density import SampleDensity
from corrpipe.cosmo.fisher import figure_of_merit, fisher_errors, fisher_matrix
from corrpipe.cosmo.infer import best_fit, laplace, sample_posterior
from corrpipe.cosmo.likelihood import DistanceLikelihood
from corrpipe.cosmo.models import MODELS, Z_RANGE, ExpansionModel
from corrpipe.cosmo.priors import ParameterSpace, r_d_fitting_formula
from corrpipe.cosmo.result import CosmologyResult

__all__ = ["QUANTITIES", "BinSamples", "DataVector", "Measurement", "bin_from_fit", "combine",
           "cross_from_mocks", "read_cross_covariance", "read_external", "SampleDensity",
           "figure_of_merit", "fisher_errors", "fisher_matrix", "best_fit", "laplace",
           "sample_posterior", "DistanceLikelihood", "MODELS", "Z_RANGE", "ExpansionModel",
           "ParameterSpace", "r_d_fitting_formula", "CosmologyResult"]
