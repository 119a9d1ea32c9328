"""Survey mocks cut with a field footprint and a per-field selection: counts against the
known volume, redshift distributions per depth class against the true-selection randoms."""

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from scipy import stats

from corrpipe.cosmology import Cosmology
from corrpipe.mocks.box import BoxMock
from corrpipe.mocks.field_survey import field_selection_randoms, select_in_fields
from corrpipe.mocks.survey import carve_survey
from corrpipe.survey.fields import CIRCLE, FieldFootprint

NBAR = 1e-3
Z_MIN, Z_MAX = 0.3, 0.45


def nz_of_class(z, classes):
    """Class 0: flat at 0.8 nbar; class 1: falling from 0.9 to 0.1 nbar (invented)."""
    z = np.asarray(z, float)
    slope = 0.9 - 0.8 * (z - Z_MIN) / (Z_MAX - Z_MIN)
    return NBAR * np.where(np.asarray(classes) == 0, 0.8, slope)


@pytest.fixture(scope="module")
def poisson_mock():
    rng = np.random.default_rng(17)
    box_size = 1400.0
    n = rng.poisson(NBAR * box_size**3)
    box = BoxMock(rng.uniform(0, box_size, (n, 3)), np.zeros((n, 3)), box_size, 0.0, 1.0,
                  NBAR, "lognormal")
    i, j = np.divmod(np.arange(240), 20)
    fp = FieldFootprint(30.0 + 1.5 * i, 15.0 + 1.5 * j, np.full(240, CIRCLE), None, None,
                        None, np.full(240, 0.5), rng.uniform(0.5, 1.0, 240),
                        (i + j) % 2)
    cosmo = Cosmology()
    carved = carve_survey(box, cosmo, fp, Z_MIN, Z_MAX, rsd=False, seed=1)
    return fp, cosmo, select_in_fields(carved, fp, nz_of_class, NBAR, seed=2)


def test_counts_per_class_match_the_selected_volume(poisson_mock):
    # class 0 has a constant density: N = 0.8 nbar x sum(area x completeness) x
    # (chi_max^3 - chi_min^3) / 3, with chi from astropy's FlatLambdaCDM (reference library;
    # same Omega_m, h-units); Poisson error
    fp, cosmo, mock = poisson_mock
    cls = fp.depth_class_of(mock.ra, mock.dec)
    ref = FlatLambdaCDM(H0=100.0, Om0=cosmo.omega_m)
    chi = ref.comoving_distance([Z_MIN, Z_MAX]).value
    area0 = np.sum((fp.owned_areas_sr() * fp.completeness_values)[fp.depth_class == 0])
    expect0 = 0.8 * NBAR * area0 * (chi[1] ** 3 - chi[0] ** 3) / 3
    n0 = np.sum(cls == 0)
    assert abs(n0 - expect0) < 4 * np.sqrt(expect0), (n0, expect0)


def test_mock_redshifts_follow_the_true_selection_randoms(poisson_mock):
    # two-sample KS per class between the mock and field_selection_randoms
    # (scipy.stats.ks_2samp); the class shares agree within binomial error
    fp, cosmo, mock = poisson_mock
    ra, dec, z = field_selection_randoms(fp, cosmo, Z_MIN, Z_MAX, 100_000, nz_of_class, seed=3)
    assert fp.contains(ra, dec).all()
    m_cls, r_cls = fp.depth_class_of(mock.ra, mock.dec), fp.depth_class_of(ra, dec)
    for k in (0, 1):
        assert stats.ks_2samp(mock.z[m_cls == k], z[r_cls == k]).pvalue > 1e-3
    share = np.mean(r_cls == 1)
    assert abs(np.mean(m_cls == 1) - share) < 4 * np.sqrt(share * (1 - share) / mock.ra.size)
    # the classes really differ (class 1 falls with z)
    assert stats.ks_2samp(z[r_cls == 0], z[r_cls == 1]).pvalue < 1e-10
