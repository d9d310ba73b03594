"""Variates: numbers of a given law made from the words of a bit source (bits.py).

Everything here is a pure function of the words it is given, so a release's outputs depend
only on which words a row draws (never on batching), and every function is exact or states
its (negligible) deviation:

- ``to_unit``: uniforms on the 2^-53 grid in [0, 1); ``unit_below``: the comparison
  ``to_unit(w) < t`` as one integer comparison; ``to_below``: integers in [0, bound).
- ``choose_m_of_d``: a uniform m-subset of d positions per row, from one word per position
  (the column choice of ``budget.strategy: sample``).

The mechanisms' own samplers (the integer-mass guide-table sampler of the grid mechanisms,
the exact Bernoulli and discrete-Laplace rejection samplers) are built on these.
"""

from __future__ import annotations

import math

import numpy as np

_U53 = 1.0 / (1 << 53)


def to_unit(words: np.ndarray) -> np.ndarray:
    """uint64 words -> floats uniform on the 2^-53 grid in [0, 1)."""
    return (words >> np.uint64(11)).astype(np.float64) * _U53


def unit_below(words: np.ndarray, t: float) -> np.ndarray:
    """``to_unit(words) < t`` exactly, by one integer comparison (no float array).

    to_unit(w) = m * 2^-53 with m = w >> 11, and for integer m, m * 2^-53 < t iff
    m < ceil(t * 2^53) iff w < ceil(t * 2^53) * 2^11 (all exact for 0 < t < 1).
    """
    t = float(t)
    if not t > 0.0:
        return np.zeros(words.shape, dtype=bool)
    if t >= 1.0:
        return np.ones(words.shape, dtype=bool)
    return words < np.uint64(math.ceil(t * (1 << 53)) << 11)


def to_below(words: np.ndarray, bound: int) -> np.ndarray:
    """uint64 words -> integers in [0, bound) by reduction modulo ``bound``.

    Each value has probability within bound / 2^64 of 1/bound (below 2^-32 relative for
    every bound the tool uses), far below anything a release of any size can detect.
    """
    return (words % np.uint64(bound)).astype(np.int64)


def choose_m_of_d(words: np.ndarray, m: int) -> np.ndarray:
    """Boolean matrix (n, d): True at the m positions of each row with the smallest words.

    The d words of a row are i.i.d. uniform, so their order is a uniform random permutation
    and its first m positions a uniform m-subset (chosen without replacement; ties have
    probability about d^2/2^65 and are broken by position)."""
    n = words.shape[0]
    chosen = np.argsort(words, axis=1, kind="stable")[:, :m]
    mask = np.zeros(words.shape, dtype=bool)
    mask[np.arange(n)[:, None], chosen] = True
    return mask
