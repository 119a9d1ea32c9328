"""Mock catalogues: lognormal and Zel'dovich boxes, survey carving, known dilations.

Public entry points (see the submodules for details):

* :func:`lognormal_box`, :func:`zeldovich_box` -> :class:`BoxMock`
* :func:`carve_survey` -> :class:`SurveyMock`; :func:`survey_randoms`; file writers
* :func:`select_in_fields`, :func:`field_selection_randoms`: field footprints with a
  selection per field (completeness x per-depth-class n(z))
* :func:`expected_dilation` -> :class:`Dilation`
* :class:`MockSettings` (the ``[mock]`` config table) and :func:`write_mocks`
* :func:`interloper_box`, :func:`mix_box`, :func:`make_interloper_mix`: line-interloper
  populations of box mocks
"""

from corrpipe.mocks.box import (BoxMock, clipped_bias_moments, clipped_linear_bias,
                                displacement_variance,
                                lagrangian_bias_for, linear_density, lognormal_box,
                                zeldovich_box)
from corrpipe.mocks.dilation import Dilation, expected_dilation
from corrpipe.mocks.field_survey import field_selection_randoms, select_in_fields
from corrpipe.mocks.interlopers import MixedBox, interloper_box, mix_box
from corrpipe.mocks.make import (MockFiles, effective_redshift, footprint_of, make_box_mock,
                                 make_interloper_mix, make_survey_mock, mock_power, nz_of,
                                 true_cosmology, write_mocks, zeldovich_expectation)
from corrpipe.mocks.settings import InterloperPopulation, MockSettings
from corrpipe.mocks.survey import (SurveyMock, carve_survey, shell_volume_fraction_outside,
                                   survey_randoms, tabulated_nz, write_box_catalogue,
                                   write_sky_catalogue)

__all__ = [
    "BoxMock", "lognormal_box", "zeldovich_box", "linear_density", "clipped_linear_bias",
    "lagrangian_bias_for", "displacement_variance", "clipped_bias_moments",
    "Dilation", "expected_dilation",
    "SurveyMock", "carve_survey", "survey_randoms", "tabulated_nz",
    "shell_volume_fraction_outside", "write_sky_catalogue", "write_box_catalogue",
    "MockSettings", "MockFiles", "write_mocks", "make_box_mock", "make_survey_mock",
    "true_cosmology", "mock_power", "zeldovich_expectation", "footprint_of", "nz_of",
    "effective_redshift", "interloper_box", "mix_box", "MixedBox", "make_interloper_mix",
    "InterloperPopulation", "select_in_fields", "field_selection_randoms",
]
