"""The small interface every randomizer offers.

A mechanism is built from its spec (a plain dict that round-trips exactly through the
manifest) and never sees a key: it is handed fixed-size blocks of pseudorandom 64-bit
words by the release layer (``keys.KeyedStream``) and turns them into outputs with
exact threshold comparisons.  Each mechanism also knows its exact channel
P(output | input), a per-row unbiased estimator and its exact variance, so that the
decoder, the validator and the tests never special-case a mechanism.

Two families:

* ``FrequencyOracle`` (categorical input codes 0..k-1): each report *supports* a set of
  values; P(v in S(y) | x = v) = p*, P(v in S(y) | x != v) = q* (Wang, Blocki, Li, Jha,
  "Locally Differentially Private Protocols for Frequency Estimation", USENIX Security
  2017).  Per-row unbiased indicator estimate: (1[v in S(y)] - q*) / (p* - q*).
* ``GridMechanism`` (bounded numeric input): the input is normalized to t in [-1, 1],
  rounded at random to a fixed grid (unbiasedly), and sent through a finite channel
  whose outputs are real numbers with E[output | grid point] = grid point exactly.  The
  written value (in the column's own units) is itself the per-row unbiased estimate.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa

from ..errors import PolicyError

_REGISTRY: dict[str, type["Mechanism"]] = {}


def register(cls: type["Mechanism"]) -> type["Mechanism"]:
    if cls.name in _REGISTRY:
        raise RuntimeError(f"mechanism name {cls.name!r} registered twice")
    _REGISTRY[cls.name] = cls
    return cls


def registry() -> dict[str, type["Mechanism"]]:
    return dict(_REGISTRY)


def build(spec: dict[str, Any]) -> "Mechanism":
    """Instantiate a mechanism from its spec (as written in the manifest)."""
    name = spec.get("mechanism")
    if name not in _REGISTRY:
        raise PolicyError(f"unknown mechanism {name!r}; known: {', '.join(sorted(_REGISTRY))}")
    return _REGISTRY[name].from_spec(spec)


def check_epsilon(eps: Any, where: str) -> float:
    if isinstance(eps, bool) or not isinstance(eps, (int, float)) or not math.isfinite(eps) or eps <= 0:
        raise PolicyError(f"{where}: epsilon must be a positive finite number, got {eps!r}")
    return float(eps)


class Mechanism(ABC):
    """Common interface.  Subclasses set ``name`` and ``kind`` and implement the rest."""

    name: ClassVar[str]
    kind: ClassVar[str]  # "categorical", "numeric" (means) or "distribution" (mechanisms/distribution.py)
    epsilon: float

    # -- construction and spec ------------------------------------------------------
    @abstractmethod
    def to_spec(self) -> dict[str, Any]:
        """Everything needed to rebuild this mechanism, as JSON-ready values."""

    @classmethod
    @abstractmethod
    def from_spec(cls, spec: dict[str, Any]) -> "Mechanism":
        """Inverse of ``to_spec``; rejects a spec of another mechanism."""

    @classmethod
    def _check_family(cls, spec: dict[str, Any]) -> None:
        if spec.get("mechanism") != cls.name:
            raise PolicyError(f"spec of mechanism {spec.get('mechanism')!r} given to {cls.name!r}")

    # -- randomization -------------------------------------------------------------
    @property
    @abstractmethod
    def words_per_row(self) -> int:
        """Number of 64-bit PRF words each row consumes (fixed: batching cannot matter)."""

    @abstractmethod
    def output_fields(self, column: str) -> list[pa.Field]:
        """The extract columns this mechanism writes for input column ``column``."""

    @abstractmethod
    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        """Randomize encoded inputs ``x`` with ``words`` of shape (n, words_per_row)."""

    #: True for exact rejection samplers that draw a variable number of extra words per row
    #: (they implement ``randomize_with``); the release then hands them a draw function too.
    variable_draws: ClassVar[bool] = False

    def randomize_with(self, x: np.ndarray, words: np.ndarray, draw: Any) -> list[pa.Array]:
        """Randomize with a fixed block of words plus ``draw(rows, j)``: word j of each given row
        from a stream of the mechanism's own.  Mechanisms with a fixed number of words per row
        ignore ``draw``."""
        return self.randomize(x, words)

    @property
    def output_bytes_per_row(self) -> int:
        """Bytes one row's report takes in memory (wide reports budget their slices by this)."""
        return 8

    @abstractmethod
    def output_meaning(self, field_name: str) -> str:
        """What the extract column ``field_name`` (one of ``output_fields``) holds, in plain
        words for the manifest."""

    @abstractmethod
    def count_invalid(self, arrays: list[pa.Array]) -> int:
        """Number of rows whose outputs fall outside this mechanism's output alphabet."""

    # -- analysis ------------------------------------------------------------------
    @abstractmethod
    def max_log_ratio(self) -> float:
        """max over outputs y and inputs x, x' of ln P(y|x)/P(y|x'), computed exactly."""

    def describe(self) -> str:
        return self.name
