"""Release randomness: bit sources (bits.py: the keyed streams that give words) apart from
variates (variates.py: uniforms, bounded integers and subsets made from words)."""

from .bits import (
           PRF_VERSION,
           BitSource,
           KeyedStream,
           RowWords,
           SubjectPRF,
           SubjectWords,
)
from .variates import choose_m_of_d, to_below, to_unit, unit_below

__all__ = ["PRF_VERSION", "BitSource", "KeyedStream", "RowWords", "SubjectPRF", "SubjectWords", "choose_m_of_d",
           "to_below", "to_unit", "unit_below"]
