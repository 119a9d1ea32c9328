"""What a new user meets first: one-line errors and clean logs (issue 13).

Reference: common practice for command-line tools — an input mistake gives one line naming
the path or key and how to fix it, and a log file carries no terminal control sequences.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from corrpipe.errors import InputError, StageError
from corrpipe.pipeline import ensure_folder, output_lock
from corrpipe.survey.catalog import sky_catalogue
from corrpipe.terminal import show_bars


def test_output_path_that_is_a_file_is_a_one_line_error(tmp_path):
    target = tmp_path / "results"
    target.write_text("not a folder")
    with pytest.raises(StageError, match=r"is an existing file, not a folder; set \[run\] output"):
        with output_lock(target):
            pass
    with pytest.raises(StageError, match="existing file"):
        ensure_folder(target / "bin1")


def test_output_folder_that_cannot_be_created_is_a_one_line_error(tmp_path):
    if os.geteuid() == 0:
        target = Path("/sys/corrpipe-output")  # sysfs refuses new folders even to root
    else:
        locked = tmp_path / "locked"
        locked.mkdir()
        locked.chmod(0o500)
        target = locked / "out"
    if not target.parent.exists():
        pytest.skip(f"{target.parent} does not exist on this machine")
    with pytest.raises(StageError, match="cannot be created"):
        ensure_folder(target)


def test_cli_reports_output_file_on_one_line(tmp_path):
    (tmp_path / "galaxies.csv").write_text("RA,DEC,Z\n10.0,1.0,0.5\n")
    (tmp_path / "results").write_text("a file")
    cfg = tmp_path / "run.toml"
    cfg.write_text('[run]\noutput = "results"\n[catalogue]\npath = "galaxies.csv"\n')
    proc = subprocess.run([sys.executable, "-c",
                           "from corrpipe.cli import main; raise SystemExit(main())",
                           "run", str(cfg), "-q"], capture_output=True, text=True,
                          cwd=tmp_path, timeout=300)
    assert proc.returncode == 2
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "existing file" in lines[0] and "Traceback" not in proc.stderr


def test_catalogue_without_rows_says_so():
    empty = np.array([], dtype=float)
    with pytest.raises(InputError, match="the file has no rows"):
        sky_catalogue(empty, empty, empty, cosmology=object(), where="empty.fits")


def test_progress_bars_only_on_a_terminal(capsys):
    # pytest's captured stderr is not a terminal: no bars, nothing written
    from corrpipe.survey.footprint import SkyBox
    from corrpipe.survey.randoms import make_randoms

    assert show_bars(True) is False and show_bars(False) is False
    rng = np.random.default_rng(1)
    z = rng.uniform(0.4, 0.6, 500)
    make_randoms(SkyBox(0.0, 10.0, 0.0, 10.0), z, np.ones(500), size_factor=5, seed=2,
                 progress=True)
    err = capsys.readouterr().err
    assert "\r" not in err and "randoms" not in err
