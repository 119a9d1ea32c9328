"""EH98 scalars against the check values of REFERENCES §1.

Source of the formulas: Eisenstein & Hu 1998, ApJ 496, 605, eqs. 2-7 and 26 [equation numbers
from memory]. The check values were computed from those formulas for the project sheet
(REFERENCES §1, tagged [COMP]) for omega_m = 0.1424, omega_b = 0.02242, T_cmb = 2.7255 K.
Tolerances: the sheet prints 6 significant figures, so 2e-6 relative (rounding of the last digit).
"""

import numpy as np
import pytest

from corrpipe.theory import eh98

WM, WB, T = 0.1424, 0.02242, 2.7255


def test_equality_scalars():
    # Eisenstein & Hu 1998 eqs. 2-3; REFERENCES §1 check table [COMP]
    assert eh98.z_equality(WM, T) == pytest.approx(3428.63, rel=2e-6)
    assert eh98.k_equality(WM, T) == pytest.approx(0.0104252, rel=2e-6)


def test_drag_redshift():
    # Eisenstein & Hu 1998 eq. 4; REFERENCES §1: z_d = 1020.78 [COMP]
    assert eh98.drag_redshift(WM, WB) == pytest.approx(1020.78, abs=0.006)


def test_baryon_ratio_at_drag_and_equality():
    # Eisenstein & Hu 1998 eq. 5; REFERENCES §1: R_d = 0.666325, R_eq = 0.198379 [COMP]
    assert eh98.baryon_ratio(eh98.drag_redshift(WM, WB), WB, T) == pytest.approx(0.666325, rel=2e-6)
    assert eh98.baryon_ratio(eh98.z_equality(WM, T), WB, T) == pytest.approx(0.198379, rel=2e-6)


def test_baryon_ratio_vectorised_scales_as_inverse_z():
    # eq. 5: R proportional to 1/z (common practice: R ~ a)
    z = np.array([500.0, 1000.0, 2000.0])
    r = eh98.baryon_ratio(z, WB, T)
    np.testing.assert_allclose(r * z, r[0] * z[0], rtol=1e-14)


def test_sound_horizons():
    # Eisenstein & Hu 1998 eqs. 6 and 26; REFERENCES §1: 151.035 and 149.942 Mpc [COMP]
    assert eh98.sound_horizon_eq6(WM, WB, T) == pytest.approx(151.035, abs=6e-4)
    assert eh98.sound_horizon_fit(WM, WB) == pytest.approx(149.942, abs=6e-4)


def test_silk_scale():
    # Eisenstein & Hu 1998 eq. 7; REFERENCES §1: k_Silk = 0.0903746 1/Mpc [COMP]
    assert eh98.silk_scale(WM, WB) == pytest.approx(0.0903746, rel=2e-6)


def test_coefficient_consistency_eq5_eq3():
    # REFERENCES §1 [COMP]: 3/(4 omega_gamma(T=2.7 K)) reproduces 31.5e3 in eq. 5, and
    # sqrt(2 * 2.5e4) * 100/c reproduces 7.46e-2 in eq. 3 -> our functions at T=2.7 K
    # must match those physical definitions to the printed precision (3 figures).
    assert eh98.k_equality(1.0, 2.7) == pytest.approx(np.sqrt(2 * 2.5e4) * 100 / 299792.458,
                                                     rel=2e-3)


@pytest.mark.parametrize("bad", [0.0, -0.1, float("nan")])
def test_bad_density_is_rejected(bad):
    # common practice: physical densities must be positive
    with pytest.raises(ValueError, match="omega_m_h2"):
        eh98.drag_redshift(bad, WB)
