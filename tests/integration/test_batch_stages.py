"""Batch-scope stages: run once after every analysis, fingerprinted by the analyses' results.

Reference: our own contract for the stage machinery (common practice for resumable batch
pipelines: a result is recomputed exactly when something it depends on changed).
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
import toy_pipeline as toy  # noqa: E402

from corrpipe.config import load_config  # noqa: E402
from corrpipe.errors import ConfigError, StageError  # noqa: E402
from corrpipe.pipeline import BATCH_KEY, batch_status, run_batch  # noqa: E402

TWO_BINS = """
[analyses.low]
alpha = { factor = 1.0 }

[analyses.high]
alpha = { factor = 2.0 }
"""


def setup(tmp_path, extra=""):
    (tmp_path / "numbers.txt").write_text("1 2 3 4\n")
    cfg = tmp_path / "run.toml"
    cfg.write_text(f"[run]\noutput = 'out'\n{extra}\n{TWO_BINS}")
    return cfg


def load(cfg):
    return load_config(cfg, classes=toy.CLASSES, batch_classes=toy.BATCH_CLASSES)


def run(cfg, **kw):
    toy.CALLS.clear()
    out = run_batch(load(cfg), stages=toy.STAGES, batch_stages=toy.BATCH_STAGES, **kw)
    return out, list(toy.CALLS)


def total(tmp_path):
    import h5py

    with h5py.File(tmp_path / "out" / "total.h5") as h5:
        return float(h5["total"][0])


def test_batch_stage_runs_after_all_analyses_and_reads_each(tmp_path):
    cfg = setup(tmp_path, "[delta]\nscale = 0.5")
    out, calls = run(cfg)
    assert calls == ["a", "b", "c"] * 2 + ["total"]
    assert out[BATCH_KEY] == {"total": "ran"}
    # sums 1..4 = 10 (x1) and 20 (x2); squared 100 and 400; times 0.5
    assert total(tmp_path) == pytest.approx(250.0)
    out, calls = run(cfg)
    assert calls == [] and out[BATCH_KEY] == {"total": "skipped"}


def test_batch_stage_reruns_when_one_analysis_changes(tmp_path):
    cfg = setup(tmp_path)
    run(cfg)
    cfg.write_text(cfg.read_text().replace("factor = 2.0", "factor = 3.0"))
    states = {s.name: s for s in batch_status(load(cfg), toy.BATCH_STAGES, toy.STAGES)}
    assert states["total"].state == "stale" and "high" in states["total"].reason
    out, calls = run(cfg)
    assert calls == ["a", "b", "c", "total"]
    assert total(tmp_path) == pytest.approx(100.0 + 900.0)


def test_only_batch_stage_uses_stored_results_and_refuses_stale_ones(tmp_path):
    cfg = setup(tmp_path)
    run(cfg)
    out, calls = run(cfg, only="total", force=True)
    assert calls == ["total"]
    cfg.write_text(cfg.read_text().replace("factor = 2.0", "factor = 5.0"))
    with pytest.raises(StageError, match="analysis 'high'.*stale"):
        run(cfg, only="total")


def test_until_an_analysis_stage_skips_batch_stages(tmp_path):
    cfg = setup(tmp_path)
    out, calls = run(cfg, until="b")
    assert "total" not in calls and BATCH_KEY not in out


def test_batch_table_cannot_be_overridden_per_analysis(tmp_path):
    cfg = setup(tmp_path)
    cfg.write_text(cfg.read_text() + "\n[analyses.extra]\ndelta = { scale = 2.0 }\n")
    with pytest.raises(ConfigError, match=r"\[analyses.extra\] cannot set 'delta'"):
        load(cfg)
