"""Release randomness: bit sources (bits.py: the keyed streams that give words) apart from
variates (variates.py: uniforms, bounded integers, subsets, the integer-mass sampler of a finite
channel and the exact rejection samplers, all made from words)."""

from .bits import (
           PRF_VERSION,
           BitSource,
           KeyedStream,
           RowWords,
           SubjectPRF,
           SubjectWords,
)
from .variates import (
           RowDraws,
           bernoulli_exp,
           choose_m_of_d,
           discrete_laplace,
           draw_index,
           to_below,
           to_unit,
           uniform_below,
           unit_below,
)

__all__ = ["PRF_VERSION", "BitSource", "KeyedStream", "RowDraws", "RowWords", "SubjectPRF", "SubjectWords",
           "bernoulli_exp", "choose_m_of_d", "discrete_laplace", "draw_index", "to_below", "to_unit", "uniform_below",
           "unit_below"]
