"""Stage machinery: skip, rerun downstream, damaged files, SIGKILL, locking (issue 2).

Reference: common practice for resumable batch pipelines (atomic replace, content checksums,
advisory locks); the expectations are of our own contract.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import pytest

sys.path.insert(0, str(Path(__file__).parent))
import toy_pipeline as toy  # noqa: E402

from corrpipe.checkpoint import checkpoint_state  # noqa: E402
from corrpipe.config import load_config  # noqa: E402
from corrpipe.errors import LockError, StageError  # noqa: E402
from corrpipe.pipeline import output_lock, run_batch, stage_status  # noqa: E402


def setup(tmp_path, extra=""):
    (tmp_path / "numbers.txt").write_text("1 2 3 4\n")
    cfg = tmp_path / "run.toml"
    cfg.write_text(f"[run]\noutput = 'out'\n{extra}")
    return cfg


def load(cfg):
    return load_config(cfg, classes=toy.CLASSES)


def run(cfg, **kw):
    toy.CALLS.clear()
    out = run_batch(load(cfg), stages=toy.STAGES, **kw)["main"]
    return out, list(toy.CALLS)


def statuses(cfg):
    c = load(cfg)
    return {s.name: s for s in stage_status(c, c.analyses[0], toy.STAGES)}


def test_second_run_skips_everything(tmp_path):
    cfg = setup(tmp_path)
    assert run(cfg)[1] == ["a", "b", "c"]
    out, calls = run(cfg)
    assert calls == [] and set(out.values()) == {"skipped"}
    assert {s.state for s in statuses(cfg).values()} == {"done"}
    with h5py.File(tmp_path / "out" / "c.h5") as h5:
        assert h5["y"][()] == pytest.approx([100.0])
        assert "power" in h5.attrs["fingerprint_parts"]
        assert h5.attrs["config_text"].startswith("[run]")


def test_change_reruns_only_downstream_and_status_says_why(tmp_path):
    cfg = setup(tmp_path)
    run(cfg)
    cfg.write_text(cfg.read_text() + "[beta]\noffset = 1.0\n")
    st = statuses(cfg)
    assert st["a"].state == "done"
    assert st["b"].state == "stale" and "[beta] offset changed" in st["b"].reason
    assert st["c"].state == "stale" and "upstream stage 'b' changed" in st["c"].reason
    assert run(cfg)[1] == ["b", "c"]
    # a changed input file is noticed through its digest
    (tmp_path / "numbers.txt").write_text("1 2 3 5\n")
    assert "input file" in statuses(cfg)["a"].reason
    assert run(cfg)[1] == ["a", "b", "c"]


def test_from_only_force(tmp_path):
    cfg = setup(tmp_path)
    run(cfg)
    assert run(cfg, from_stage="b")[1] == ["b", "c"]
    assert run(cfg, only="b")[1] == ["b"]
    assert run(cfg, force=True)[1] == ["a", "b", "c"]
    with pytest.raises(StageError, match="no such stage.*did you mean 'b'"):
        run(cfg, only="bb")
    (tmp_path / "out" / "a.h5").unlink()
    with pytest.raises(StageError, match="--only c needs stage 'a'"):
        run(cfg, only="c")


def test_truncated_checkpoint_is_detected_and_recomputed(tmp_path):
    cfg = setup(tmp_path)
    run(cfg)
    path = tmp_path / "out" / "b.h5"
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    assert checkpoint_state(path)[0].startswith("damaged")
    assert statuses(cfg)["b"].state == "damaged"
    assert run(cfg)[1] == ["b"]  # same fingerprint, so c stays valid
    with h5py.File(tmp_path / "out" / "c.h5") as h5:
        assert h5["y"][()] == pytest.approx([100.0])


def test_flipped_byte_is_detected(tmp_path):
    cfg = setup(tmp_path)
    run(cfg)
    path = tmp_path / "out" / "b.h5"
    with h5py.File(path, "r") as h5:
        offset = h5["big"].id.get_offset()
    raw = bytearray(path.read_bytes())
    raw[offset + 8 * 1000] ^= 0xFF
    path.write_bytes(bytes(raw))
    assert checkpoint_state(path)[0] == "damaged: checksum mismatch"
    assert run(cfg)[1] == ["b"]


def test_sigkill_mid_stage_leaves_no_half_file_and_rerun_matches(tmp_path):
    cfg = setup(tmp_path, "[beta]\nsleep = 30.0\n")
    env = dict(os.environ, PYTHONPATH=str(Path(toy.__file__).parent))
    proc = subprocess.Popen([sys.executable, toy.__file__, str(cfg)], env=env)
    out = tmp_path / "out"
    deadline = time.time() + 60
    while not list(out.glob(".b.*.progress.h5")) and time.time() < deadline:
        time.sleep(0.05)
    assert proc.poll() is None, "toy run ended early"
    # a second concurrent run on the same folder is refused while the first holds the lock
    with pytest.raises(LockError, match="in use by another corrpipe run"):
        run(cfg)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert (out / "a.h5").exists() and not (out / "b.h5").exists()
    assert checkpoint_state(out / "a.h5")[0] == "ok"
    # the kernel released the lock with the process; the rerun (no sleep) completes
    cfg.write_text(cfg.read_text().replace("sleep = 30.0", "sleep = 0.0"))
    outcome, calls = run(cfg)
    assert calls == ["b", "c"]
    assert not list(out.glob(".b.*"))  # sidecar and temporary files are gone
    with h5py.File(out / "c.h5") as h5:
        assert h5["y"][()] == pytest.approx([100.0])


def test_lock_is_exclusive(tmp_path):
    with output_lock(tmp_path):
        with pytest.raises(LockError):
            with output_lock(tmp_path):
                pass
    with output_lock(tmp_path):  # released
        pass


def test_kill_during_file_write_leaves_previous_file_intact(tmp_path, monkeypatch):
    cfg = setup(tmp_path)
    run(cfg)
    before = (tmp_path / "out" / "b.h5").read_bytes()
    cfg.write_text(cfg.read_text() + "[beta]\noffset = 2.0\n")

    import corrpipe.checkpoint as ck

    real = ck.content_checksum

    class Boom(Exception):
        pass

    def boom(h5):  # fail after the datasets are written, before the commit mark
        if "total" in h5:
            raise Boom
        return real(h5)

    monkeypatch.setattr(ck, "content_checksum", boom)
    with pytest.raises(Boom):
        run(cfg)
    monkeypatch.undo()
    assert (tmp_path / "out" / "b.h5").read_bytes() == before
    assert not list((tmp_path / "out").glob(".b.h5.tmp-*"))
    assert checkpoint_state(tmp_path / "out" / "b.h5")[0] == "ok"
