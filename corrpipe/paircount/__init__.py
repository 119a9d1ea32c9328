"""Weighted pair counting in (s, mu), (r_p, pi) and s with numba cell lists."""

from corrpipe.paircount.result import PairCounts

__all__ = ["PairCounts"]
