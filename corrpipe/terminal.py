"""Whether to draw progress bars: only when asked *and* when someone can watch them.

A bar redrawn with carriage returns is useful on a terminal and in a notebook; written to a
log file (stderr redirected) it fills the file with hundreds of frames per stage. Off a
terminal corrpipe therefore draws no bars at all; the stages' log lines (one when a stage
starts, one when it ends, with its time) still say what is happening.
"""

from __future__ import annotations

import sys

__all__ = ["show_bars"]


def show_bars(progress: bool) -> bool:
    """True when a progress bar should be drawn: ``progress`` is on and stderr is a terminal
    (or the code runs in a Jupyter kernel, whose bars are widgets)."""
    if not progress:
        return False
    if "ipykernel" in sys.modules:
        return True
    isatty = getattr(sys.stderr, "isatty", None)
    try:
        return bool(isatty()) if isatty is not None else False
    except ValueError:  # a closed stream
        return False
