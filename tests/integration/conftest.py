"""Small survey catalogues and configs for the stage and CLI tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

BASE_CONFIG = """
[run]
output = "out"
seed = 11

[catalogue]
path = "galaxies.fits"
weight_columns = ["WEIGHT"]
z_min = 0.4
z_max = 0.6

[footprint]
boxes = [[150.0, 170.0, 0.0, 15.0]]

[randoms]
size_factor = 3
n_sets = 3

[counts]
s_max = 160.0
n_s = 16
n_mu = 20

[covariance]
n_regions = 30
kmeans_sample = 5000

[fit]
s_min = 50.0
s_max = 150.0
max_steps = 400
check_every = 100
n_walkers = 16
profile_points = 0

[report]
plots = false
"""


def write_poisson_survey(folder: Path, n: int = 3000, seed: int = 3) -> Path:
    """Uniform (Poisson) galaxies in an RA/Dec box with 0.4 < z < 0.6 (invented test data)."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(150.0, 170.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(0.0, np.sin(np.radians(15.0)), n)))
    # redshifts ~ uniform in comoving volume over the shell, roughly (d^2 weighting)
    u = rng.uniform(0.4**3, 0.6**3, n)
    z = np.cbrt(u)
    w = rng.uniform(0.8, 1.2, n)
    path = folder / "galaxies.fits"
    Table(dict(RA=ra, DEC=dec, Z=z, WEIGHT=w)).write(path, overwrite=True)
    return path


@pytest.fixture
def survey_run(tmp_path):
    """A folder with a Poisson survey catalogue and a fast config; returns the config path."""
    write_poisson_survey(tmp_path)
    cfg = tmp_path / "run.toml"
    cfg.write_text(BASE_CONFIG)
    return cfg


@pytest.fixture
def survey_inputs():
    """(BASE_CONFIG text, write_poisson_survey) for tests that vary the catalogue or config.

    A fixture rather than ``from conftest import ...``: several test folders have a
    conftest.py, and the module name ``conftest`` refers to whichever was loaded last.
    """
    return BASE_CONFIG, write_poisson_survey
