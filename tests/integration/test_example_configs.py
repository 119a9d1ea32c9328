"""The example configs in configs/ are valid (common practice: shipped examples must work)."""

from __future__ import annotations

from pathlib import Path

import pytest

from corrpipe import api
from corrpipe.config import tomllib, validate_section

CONFIGS = Path(__file__).resolve().parents[2] / "configs"


@pytest.mark.parametrize("name", ["survey_bins.toml", "box_reconstructed.toml",
                                  "cluster_slurm.toml"])
def test_pipeline_examples_validate(name):
    cfg = api.check(CONFIGS / name)
    assert cfg.analyses


@pytest.mark.parametrize("name", ["mock_survey.toml", "mock_box.toml"])
def test_mock_examples_validate(name):
    from corrpipe.mocks import MockSettings

    path = CONFIGS / name
    data = tomllib.loads(path.read_text())
    settings = validate_section(MockSettings, data["mock"], "mock", str(path), CONFIGS)
    assert settings.n_mocks >= 1
