"""Data vector of the expansion-history fit: external files, cross-covariances, bad inputs.

References: the file format is our own (README, 'Cosmology from BAO distances'); a
covariance must be symmetric positive definite (common practice); the kernel density is
scipy.stats.gaussian_kde and the Gaussian density it must approach is analytic.
"""

from __future__ import annotations

import numpy as np
import pytest

from corrpipe.cosmo.data import (BinSamples, combine, cross_from_mocks, read_cross_covariance,
                                 read_external)
from corrpipe.cosmo.density import SampleDensity
from corrpipe.errors import InputError

HEADER = """# %ECSV 1.0
# ---
# datatype:
# - {name: label, datatype: string}
# - {name: z, datatype: float64}
# - {name: quantity, datatype: string}
# - {name: value, datatype: float64}
# - {name: error, datatype: float64}
# meta:
#   source: invented numbers for a format test
#   correlations:
#   - [0, 1, CORR]
# schema: astropy-2.0
label z quantity value error
"""
ROWS = "north 0.61 DM_over_rd 15.4 0.3\nnorth 0.61 DH_over_rd 20.9 0.6\n"


def write(tmp_path, rows=ROWS, corr="-0.4", name="ext.ecsv"):
    path = tmp_path / name
    path.write_text(HEADER.replace("CORR", corr) + rows)
    return path


def one_line(exc) -> str:
    text = str(exc.value)
    assert "\n" not in text
    return text


def test_external_file_reads_values_and_covariance(tmp_path):
    d = read_external(write(tmp_path))
    assert [m.quantity for m in d.measurements] == ["DM_over_rd", "DH_over_rd"]
    assert d.values.tolist() == [15.4, 20.9]
    assert d.covariance[0, 1] == pytest.approx(-0.4 * 0.3 * 0.6)
    assert d.errors.tolist() == pytest.approx([0.3, 0.6])


def test_non_positive_definite_covariance_is_a_one_line_error(tmp_path):
    with pytest.raises(InputError, match="not positive definite") as exc:
        read_external(write(tmp_path, corr="-1.2"))
    assert str(tmp_path / "ext.ecsv") in one_line(exc)


def test_duplicate_measurement_in_a_file_is_a_one_line_error(tmp_path):
    rows = ROWS + "north 0.61 DM_over_rd 15.5 0.3\n"
    with pytest.raises(InputError, match="duplicate measurement: DM_over_rd at z = 0.61") as exc:
        read_external(write(tmp_path, rows))
    one_line(exc)


def test_same_bin_from_two_sources_is_refused(tmp_path):
    a = read_external(write(tmp_path))
    b = read_external(write(tmp_path, name="again.ecsv"))
    with pytest.raises(InputError, match="duplicate measurement") as exc:
        combine([a, b])
    assert "again.ecsv" in one_line(exc)


@pytest.mark.parametrize("rows,match", [
    ("north 0.61 DA_over_rd 15.4 0.3\n", "quantity 'DA_over_rd' is unknown"),
    ("north 0.61 DM_over_rd -1.0 0.3\n", "value must be finite and the value positive"),
    ("north 0.61 DM_over_rd 15.4 0.0\n", "'error' must be positive"),
])
def test_bad_rows_are_one_line_errors(tmp_path, rows, match):
    path = tmp_path / "bad.ecsv"
    path.write_text(HEADER.replace("  correlations:\n#   - [0, 1, CORR]\n", "") + rows)
    with pytest.raises(InputError, match=match) as exc:
        read_external(path)
    one_line(exc)


def test_missing_file_and_missing_columns(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_external(tmp_path / "nope.ecsv")
    path = tmp_path / "cols.ecsv"
    path.write_text("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: z, datatype: float64}\n"
                    "# schema: astropy-2.0\nz\n0.5\n")
    with pytest.raises(InputError, match="missing column"):
        read_external(path)


def test_cross_covariance_terms_enter_the_joint_matrix(tmp_path):
    a = read_external(write(tmp_path))
    rows = "south 0.85 DM_over_rd 19.9 0.4\nsouth 0.85 DH_over_rd 18.1 0.5\n"
    b = read_external(write(tmp_path, rows, name="b.ecsv"))
    cross = tmp_path / "cross.ecsv"
    cross.write_text("# %ECSV 1.0\n# ---\n# datatype:\n- {name: label_a, datatype: string}\n"
                     .replace("\n-", "\n# -")
                     + "# - {name: quantity_a, datatype: string}\n"
                     "# - {name: label_b, datatype: string}\n"
                     "# - {name: quantity_b, datatype: string}\n"
                     "# - {name: covariance, datatype: float64}\n# schema: astropy-2.0\n"
                     "label_a quantity_a label_b quantity_b covariance\n"
                     "north DM_over_rd south DM_over_rd 0.03\n")
    joint = combine([a, b], read_cross_covariance(cross))
    assert joint.covariance[0, 2] == joint.covariance[2, 0] == pytest.approx(0.03)
    assert joint.covariance[1, 3] == 0.0
    with pytest.raises(InputError, match="not in the data vector"):
        combine([a], read_cross_covariance(cross))


def test_cross_covariance_from_joint_mock_samples(tmp_path):
    rng = np.random.default_rng(3)
    shared = rng.standard_normal(400)
    x = 0.8 * shared + 0.6 * rng.standard_normal(400)   # corr(x, y) = 0.64 by construction
    y = 0.8 * shared + 0.6 * rng.standard_normal(400)
    from astropy.table import Table

    Table({"north:DM_over_rd": 15.4 + 0.3 * x, "south:DM_over_rd": 19.9 + 0.4 * y}).write(
        tmp_path / "mocks.ecsv", format="ascii.ecsv")
    a = read_external(write(tmp_path))
    b = read_external(write(tmp_path, "south 0.85 DM_over_rd 19.9 0.4\n"
                            "south 0.85 DH_over_rd 18.1 0.5\n", name="b.ecsv"))
    joint = combine([a, b])
    terms = cross_from_mocks(tmp_path / "mocks.ecsv", joint)
    assert len(terms) == 1
    r = terms[0][4] / (0.3 * 0.4)
    assert r == pytest.approx(np.corrcoef(x, y)[0, 1], abs=1e-12)
    assert 0.55 < r < 0.72  # 0.64 +- 2.5 sigma for 400 mocks


def test_bin_samples_mean_and_covariance():
    rng = np.random.default_rng(1)
    cov = np.array([[0.09, -0.05], [-0.05, 0.36]])
    s = rng.multivariate_normal([15.0, 21.0], cov, size=20000)
    d = BinSamples("low", 0.5, ("DM_over_rd", "DH_over_rd"), s).data_vector()
    assert d.values == pytest.approx([15.0, 21.0], abs=0.02)
    assert d.covariance == pytest.approx(cov, rel=0.05, abs=2e-3)


def test_sample_density_matches_scipy_kde_and_the_gaussian():
    # The tabulated log density reproduces scipy.stats.gaussian_kde (the reference library)
    # to the interpolation error, and the kernel density of Gaussian samples follows the
    # analytic Gaussian of covariance C (1 + n^(-1/3)) (Scott's bandwidth in 2-D, scipy docs)
    # up to the sampling noise of 6000 samples (~0.1 in ln density at 1 sigma).
    from scipy.stats import gaussian_kde

    rng = np.random.default_rng(2)
    cov = np.array([[0.09, -0.05], [-0.05, 0.36]])
    n = 6000
    s = rng.multivariate_normal([15.0, 21.0], cov, size=n)
    dens = SampleDensity(s)
    kde = gaussian_kde(s.T)
    prec = np.linalg.inv(cov * (1 + n ** (-1 / 3)))
    centre = np.array([15.0, 21.0])
    for dx in ([0.3, 0.0], [0.0, -0.6], [-0.2, 0.5], [0.45, -0.3]):
        v = centre + dx
        got = dens.log_density(v) - dens.log_density(centre)
        assert got == pytest.approx(float(np.log(kde(v)[0] / kde(centre)[0])), abs=0.005)
        assert got == pytest.approx(-0.5 * np.array(dx) @ prec @ np.array(dx), abs=0.15)
    # far outside the sampled range the log density keeps falling
    assert dens.log_density(np.array([25.0, 21.0])) < dens.log_density(np.array([18.0, 21.0]))


def test_sample_density_needs_enough_samples():
    with pytest.raises(InputError, match="at least 50"):
        SampleDensity(np.ones((10, 2)))
