"""Shared pytest fixtures."""

from __future__ import annotations

import os

# Keep numba's thread pool at the machine's size and cache compiled kernels between test runs.
os.environ.setdefault("NUMBA_CACHE_DIR", os.path.join(os.path.expanduser("~"), ".cache", "corrpipe-numba"))
