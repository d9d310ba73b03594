"""The contract every randomizer fills: the ``Mechanism`` base class.

A mechanism is built from its spec (a plain dict that round-trips exactly through the
manifest) and never sees a key: it is handed fixed-size blocks of pseudorandom 64-bit
words by the release layer (a ``random.bits.BitSource``) and turns them into outputs with
exact threshold comparisons (``random.variates``).  Each mechanism also knows its exact channel
P(output | input), a per-row unbiased estimator and its exact variance, so that the
decoder, the validator and the tests never special-case a mechanism.

Everything the rest of the tool needs to know about a mechanism is asked through this
class (template-method style: the public methods here validate and assemble, subclasses
fill small hooks), never decided by the mechanism's name or by probing its attributes:

* construction: ``from_spec`` / ``to_spec`` (the manifest), ``from_policy`` (a policy
  column: its fields are validated with the mechanism's own pydantic model ``Params``,
  which names the policy fields the mechanism accepts);
* randomization: ``words_per_row``, ``randomize`` / ``randomize_with`` (``variable_draws``),
  ``output_fields``, ``output_meaning``, ``output_bytes_per_row``, ``count_invalid``;
* analysis: ``max_log_ratio``, ``family``, ``decoder`` (a fresh decoder of the family:
  ``add`` a batch of reports, ``merge`` another, read the result; mechanisms/decoders.py),
  ``fit_test`` / ``no_fit_reason`` (goodness of fit, mechanisms/fit.py);
* policy and planning: ``accepts_binned`` / ``binned_refusal``, ``supports_memoize`` /
  ``memoize_refusal``, ``exact_decimal_epsilon``, ``fixed_epsilon``, ``mean_row_variance``,
  ``frequency_row_variance``, ``efficiency``;
* the second layer of a memoized column (``rerandomize_epsilon``): ``supports_second_layer`` /
  ``second_layer_refusal``, ``second_layer_words_per_row``, ``rerandomize``,
  ``composite_epsilon``, ``with_second_layer`` (the composite, same class) and ``permanent``;
* per-row estimates (the partner's reader, perrow.py): ``per_row_columns`` (the frame columns
  of one input column), ``per_row_values`` (their values, whose means over the reporting rows are
  the decoder's point estimates), ``per_row_reason`` / ``per_row_note`` (why there are none);
* the empirical audit (audit.py, ``ldpt audit``): ``audit_pairs`` (worst-case inputs),
  ``audit_outcomes`` / ``audit_ordered`` (what a report says about them); ``worst_channel_pairs``
  reads the pairs off an exact channel.

Three family bases fill most hooks:

* ``FrequencyOracle`` (categorical.py; categorical input codes 0..k-1): each report
  *supports* a set of values; P(v in S(y) | x = v) = p*, P(v in S(y) | x != v) = q* (Wang,
  Blocki, Li, Jha, "Locally Differentially Private Protocols for Frequency Estimation",
  USENIX Security 2017).  Per-row unbiased indicator estimate: (1[v in S(y)] - q*) / (p* - q*).
* ``MeanMechanism`` (bounded numeric input, decoded as a mean): ``GridMechanism`` (numeric.py:
  the input is normalized to t in [-1, 1], rounded at random to a fixed grid (unbiasedly),
  and sent through a finite channel whose outputs are real numbers with
  E[output | grid point] = grid point exactly) and ``DiscreteLaplace``.  The written value
  (in the column's own units) is itself the per-row unbiased estimate.
* ``DistributionMechanism`` (bounded numeric input, decoded as a distribution: CDF,
  quantiles, range shares): ``SquareWave`` and ``Hierarchy`` (distribution.py), with additive
  count statistics (``new_stats``, ``add_stats``) and ``decode``.

Each family base implements ``decoder`` once (``FrequencyDecoder``, ``MeanDecoder``,
``DistributionDecoder`` of mechanisms/decoders.py), so the estimator never chooses a class.

A new mechanism is one module (a subclass of a family base, decorated with ``@register``)
plus its import and listing in mechanisms/__init__.py.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from fractions import Fraction
from typing import TYPE_CHECKING, Any, ClassVar
from collections.abc import Mapping, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, ConfigDict, ValidationError

from ..errors import PolicyError
from .decoders import Decoder, DistributionDecoder, MeanDecoder, numeric_values

if TYPE_CHECKING:
    from .fit import FitStats

#: The decoder families: frequency oracles (categorical reports), mean mechanisms (each report
#: an unbiased estimate of the row's value), distribution mechanisms (decoded as a whole) and
#: quantile mechanisms (one quantile of a numeric column, decoded with its interval).
FAMILIES = ("frequency", "mean", "distribution", "quantile")

_REGISTRY: dict[str, type[Mechanism]] = {}


def register(cls: type[Mechanism]) -> type[Mechanism]:
    if cls.name in _REGISTRY:
        raise RuntimeError(f"mechanism name {cls.name!r} registered twice")
    _REGISTRY[cls.name] = cls
    return cls


def registry() -> dict[str, type[Mechanism]]:
    return dict(_REGISTRY)


def build(spec: dict[str, Any]) -> Mechanism:
    """Instantiate a mechanism from its spec (as written in the manifest).  A spec with a
    ``missing_answer`` entry is a value report with a missing flag (mechanisms/missing.py).  A spec with a
    ``second_layer`` entry is the composite channel of a memoized column re-randomized in each
    release (``Mechanism.with_second_layer``): it is rebuilt from its two layers, and its stated
    epsilon must be the composite's."""
    name = spec.get("mechanism")
    if name not in _REGISTRY:
        raise PolicyError(f"unknown mechanism {name!r}; known: {', '.join(sorted(_REGISTRY))}")
    if "missing_answer" in spec:   # a value with a missing flag (missing: as-answer; mechanisms/missing.py)
        from .missing import MissingFlag

        return MissingFlag.from_spec(spec)
    if "second_layer" not in spec:
        return _REGISTRY[name].from_spec(spec)
    layer = spec["second_layer"]
    if not isinstance(layer, dict) or set(layer) != {"permanent_epsilon", "epsilon"}:
        raise PolicyError(f"mechanism {name}: second_layer must give permanent_epsilon and epsilon, got {layer!r}")
    permanent = {k: v for k, v in spec.items() if k != "second_layer"}
    permanent["epsilon"] = layer["permanent_epsilon"]
    composite = _REGISTRY[name].from_spec(permanent).with_second_layer(layer["epsilon"])
    stated = spec.get("epsilon")
    if (not isinstance(stated, (int, float))
            or abs(composite.epsilon - float(stated)) > 1e-9 * max(1.0, composite.epsilon)):
        raise PolicyError(f"mechanism {name}: the spec states epsilon {stated!r}, but its two layers (permanent eps "
                          f"{layer['permanent_epsilon']!r}, then eps {layer['epsilon']!r}) compose to "
                          f"{composite.epsilon!r}")
    return composite


@dataclass(frozen=True)
class PerRowColumn:
    """One column of the partner's per-row reader (``Mechanism.per_row_columns``): its name in the
    frame and what its mean over rows estimates, in plain words."""

    name: str
    meaning: str


class NoParams(BaseModel):
    """The policy parameters of a mechanism that takes none beyond eps and its domain."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class MechanismParamError(PolicyError):
    """A policy field of a mechanism is missing or refused; ``field`` names it, so that the policy
    can prefix the column and the field to the message."""

    def __init__(self, field: str, message: str) -> None:
        super().__init__(message)
        self.field = field


def check_epsilon(eps: Any, where: str) -> float:
    if isinstance(eps, bool) or not isinstance(eps, (int, float)) or not math.isfinite(eps) or eps <= 0:
        raise PolicyError(f"{where}: epsilon must be a positive finite number, got {eps!r}")
    return float(eps)


def certified_epsilon(ratio: Fraction) -> float:
    """The eps to state for a channel whose exact worst likelihood ratio is ``ratio``: the smallest
    float from ln(ratio) up whose certified lower bound of e^eps (``random.variates.exp_lower_bound``)
    is at least ``ratio``, so the stated eps is never below the realized one."""
    from ..random.variates import exp_lower_bound

    eps = math.log(ratio)
    while exp_lower_bound(eps) < ratio:
        eps = math.nextafter(eps, math.inf)
    return eps


class Mechanism(ABC):
    """Common interface.  Subclasses set ``name``, ``kind`` and ``family`` (the family bases do the
    last two) and implement the rest."""

    name: ClassVar[str]
    kind: ClassVar[str]  # "categorical", "numeric" (means) or "distribution" (mechanisms/distribution.py)
    #: which decoder reads the reports: "frequency", "mean" or "distribution" (see FAMILIES)
    family: ClassVar[str]
    #: The policy fields this mechanism accepts besides epsilon and its domain (categories or
    #: bounds), as a pydantic model with ``extra="forbid"``; a field left out (None) takes the
    #: constructor's default.  ``from_policy`` validates with it.
    Params: ClassVar[type[BaseModel]] = NoParams
    #: Policy fields this mechanism refuses with a reason of its own (field -> message), when
    #: the field belongs to other mechanisms or to the automatic choice (two-point: no grid).
    field_refusals: ClassVar[dict[str, str]] = {}
    #: Why this mechanism's decoded statistics state no interval (None: its intervals hold).  A
    #: decoder whose bias cannot be bounded sets it; ``plan`` shows it before a release.
    no_interval: str | None = None
    epsilon: float

    # -- construction and spec ------------------------------------------------------
    @abstractmethod
    def to_spec(self) -> dict[str, Any]:
        """Everything needed to rebuild this mechanism, as JSON-ready values."""

    @classmethod
    @abstractmethod
    def from_spec(cls, spec: dict[str, Any]) -> Mechanism:
        """Inverse of ``to_spec``; rejects a spec of another mechanism."""

    @classmethod
    def _check_family(cls, spec: dict[str, Any]) -> None:
        if spec.get("mechanism") != cls.name:
            raise PolicyError(f"spec of mechanism {spec.get('mechanism')!r} given to {cls.name!r}")

    # -- construction from a policy column -------------------------------------------
    @classmethod
    def policy_fields(cls) -> tuple[str, ...]:
        """Names of the policy fields this mechanism accepts (those of ``Params``)."""
        return tuple(cls.Params.model_fields)

    @classmethod
    def from_policy(cls, epsilon: float, domain: Sequence[Any], params: Mapping[str, Any]) -> Mechanism:
        """Build from a policy column: ``domain`` is the list of categories (frequency oracles) or
        the bounds (numeric mechanisms); ``params`` the column's values of ``policy_fields``
        (None or absent: the default).  Raises ``MechanismParamError`` for a missing or refused
        field and ``PolicyError`` for a value the mechanism cannot use."""
        given = {k: v for k, v in params.items() if v is not None}
        try:
            p = cls.Params.model_validate(given)
        except ValidationError as err:
            raise cls._params_error(err, domain) from None
        return cls._from_params(epsilon, domain, p)

    @classmethod
    def _from_params(cls, epsilon: float, domain: Sequence[Any], params: BaseModel) -> Mechanism:
        """Hook: the constructor call for validated parameters (default: keyword arguments)."""
        return cls(epsilon, domain, **params.model_dump(exclude_none=True))  # type: ignore[call-arg]

    @classmethod
    def refuse_field(cls, field: str) -> str:
        """Why this mechanism does not take the policy field ``field``."""
        return cls.field_refusals.get(field, f"{field} does not apply to mechanism {cls.name}; remove {field}")

    @classmethod
    def missing_field_message(cls, field: str, domain: Sequence[Any]) -> str:
        """Hook: the message for a required policy field the column does not give."""
        return f"mechanism {cls.name} needs the field {field}"

    @classmethod
    def _params_error(cls, err: ValidationError, domain: Sequence[Any]) -> PolicyError:
        e = err.errors()[0]
        field = str(e["loc"][0]) if e.get("loc") else "?"
        if e["type"] == "extra_forbidden":
            return MechanismParamError(field, cls.refuse_field(field))
        if e["type"] == "missing":
            return MechanismParamError(field, cls.missing_field_message(field, domain))
        return PolicyError(f"mechanism {cls.name}, field '{field}': {e['msg']} (got {e.get('input')!r})")

    #: False for a mechanism that cannot be declared on a numeric column released as bins;
    #: ``binned_refusal`` then says why (only frequency oracles take bins at all).
    accepts_binned: ClassVar[bool] = True
    binned_refusal: ClassVar[str] = ""
    #: True for a mechanism that takes its eps as the exact fraction of its decimal text (it
    #: refuses an eps such as epsilon_per_row / m without a short decimal form).
    exact_decimal_epsilon: ClassVar[bool] = False

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

    #: True for a sequential mechanism: rows are grouped in phases by their global row index
    #: (``phase_of``), every row of a phase is randomized with the phase's setting, which the
    #: mechanism computes from the reports of the earlier phases only (``start_run`` gives the
    #: release's run: ``setting(phase)``, ``add(phase, rows, reports)``), and ``randomize_phase``
    #: randomizes rows of one phase.  The release reads rows in order and splits batches at phase
    #: boundaries (release/kernel.py); the dask engine works the settings out in a pre-pass.
    sequential: ClassVar[bool] = False

    def phase_of(self, rows: np.ndarray) -> np.ndarray:
        """The phase of each global row index (sequential mechanisms)."""
        raise NotImplementedError(f"mechanism {self.name} is not sequential")

    def start_run(self) -> Any:
        """A fresh run of a sequential mechanism for one release (its settings and counts)."""
        raise NotImplementedError(f"mechanism {self.name} is not sequential")

    def randomize_phase(self, x: np.ndarray, words: np.ndarray, phase: int, setting: Any) -> list[pa.Array]:
        """Randomize rows of one phase with that phase's setting (sequential mechanisms)."""
        raise NotImplementedError(f"mechanism {self.name} is not sequential")

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

    def realized_ratio(self) -> Fraction | None:
        """For a sampler that compares words with integer thresholds (probabilities T / 2^64, or the
        integer masses of ``random.variates.integer_masses`` in units of 2^-50): the
        worst likelihood ratio of the channel those thresholds realize, as an exact rational (or an
        exact rational upper bound of it, where the mechanism says so), to be compared with a
        certified lower bound of e^eps (``random.variates.exp_lower_bound``; docs/formulas.md
        section 10.4).  For a composite with a second layer (``second_layer_of``): the exact ratio
        of the channel through both layers.  None for the other mechanisms, whose check is
        ``max_log_ratio``.  Samplers give their own channel's ratio in ``_threshold_ratio``; the
        composite case is handled here once."""
        if self.second_layer_of is not None:
            permanent, epsilon2 = self.second_layer_of
            return permanent.second_layer_ratio(epsilon2)
        return self._threshold_ratio()

    def _threshold_ratio(self) -> Fraction | None:
        """The exact worst ratio of this sampler's own integer thresholds (None: not such a sampler)."""
        return None

    def describe(self) -> str:
        return self.name

    @property
    def label(self) -> str:
        """The short name people see in tables (plan, policy check): the registered name, or for
        a composite its value mechanism and what it adds."""
        return self.name

    # -- decoding (mechanisms/decoders.py) ---------------------------------------------
    @abstractmethod
    def decoder(self, *, joint: bool = False) -> Decoder:
        """A fresh decoder of this mechanism's reports: ``add(arrays)`` a batch (rows that did not
        report removed), ``merge(other)`` a decoder of the same mechanism, then read the family's
        result (``frequencies`` / ``estimates`` / ``covariance``, ``mean``, ``distribution``).
        ``joint``: also keep what the covariance of the frequency estimates needs (co-support
        counts; frequency oracles only, the other families keep all they need anyway).
        Implemented once by each family base."""

    # -- per-row estimates (the partner's reader, ldptransform/perrow.py) ---------------
    #: Why this mechanism's reports give no per-row unbiased estimate ('' when they do): its
    #: decoder is not an average of per-row values (a smoothing reconstruction, a combination of
    #: subsets of the rows with weights that depend on their sizes).
    per_row_reason: ClassVar[str] = ""

    def per_row_columns(self, column: str) -> list[PerRowColumn]:
        """The per-row unbiased estimates that the reports of input column ``column`` give, one
        frame column each (its name and meaning), in the order of ``per_row_values``.  The mean of
        a column's values over the rows that reported is exactly the decoder's point estimate of
        it (the decoder adds these very values), and each value is unbiased for its row's true
        quantity.  [] when there is none (``per_row_reason``); the family bases fill this."""
        return []

    def per_row_values(self, arrays: list[pa.Array]) -> np.ndarray:
        """The per-row unbiased estimates of the reports in ``arrays`` (rows that did not report
        removed), float64 of shape (rows, len(per_row_columns)), vectorized over rows."""
        raise NotImplementedError(self.per_row_reason or f"mechanism {self.name} gives no per-row estimates")

    def per_row_note(self, column: str) -> str:
        """What of input column ``column`` the reader leaves out, and why ('' when nothing)."""
        if self.per_row_columns(column):
            return ""
        reason = self.per_row_reason or f"mechanism {self.name} gives no per-row unbiased estimate"
        return f"{column}: left out: {reason}; its estimates come from ldpt estimate"

    # -- memoized randomness ---------------------------------------------------------
    @property
    def supports_memoize(self) -> bool:
        """Memoized randomness replays a fixed block of words per (person, value): a mechanism
        with a variable number of draws per row cannot take it."""
        return not self.variable_draws

    @property
    def memoize_refusal(self) -> str:
        """Why memoize is refused ('' when it is supported)."""
        if self.supports_memoize:
            return ""
        return (f"mechanism {self.name} draws a variable number of random words per row, which memoized randomness "
                "does not support; remove memoize, or choose another mechanism for this column")

    # -- second randomization layer (memoized columns) ----------------------------------
    # A memoized column's report is permanent: the same for a (person, value) in every release.
    # A second layer re-randomizes that permanent report in each release with fresh noise at its
    # own eps (the instantaneous randomized response of Erlingsson, Pihur, Korolova, "RAPPOR:
    # Randomized Aggregatable Privacy-Preserving Ordinal Response", CCS 2014).  A mechanism that
    # supports it gives the layer (``second_layer_words_per_row``, ``rerandomize``) and the eps of
    # the composite channel (permanent, then instantaneous), which stays in the mechanism's own
    # family: ``with_second_layer`` returns the mechanism of that composite, the one the release
    # states, the manifest carries and the family decoder reads (docs/formulas.md section 9.3).

    #: True for a mechanism whose memoized report a second layer can re-randomize, the composite
    #: staying in the mechanism's family (it then implements the three hooks below).
    supports_second_layer: ClassVar[bool] = False
    #: A mechanism's own reason for having no second layer ('' : the generic reason).
    second_layer_reason: ClassVar[str] = ""
    #: On a composite (``with_second_layer``): (the permanent layer's mechanism, the second layer's eps).
    second_layer_of: tuple[Mechanism, float] | None = None

    @property
    def second_layer_refusal(self) -> str:
        """Why ``rerandomize_epsilon`` is refused ('' when supported), naming the mechanisms of the
        same kind of column that take it (from the registry)."""
        if self.supports_second_layer:
            return ""
        families = ("frequency",) if self.family == "frequency" else ("mean", "distribution")
        takers = [n for n, c in _REGISTRY.items() if c.supports_second_layer and c.family in families]
        reason = self.second_layer_reason or (f"mechanism {self.name} has no second randomization layer whose "
                                              "composite channel stays in its own family")
        return (f"{reason}. A second layer (rerandomize_epsilon) is available for mechanism{'s' * (len(takers) > 1)} "
                f"{', '.join(takers) or 'none'} on this kind of column: set mechanism to one of them, or remove "
                "rerandomize_epsilon")

    @property
    def second_layer_words_per_row(self) -> int:
        """64-bit words per row the second layer draws (from the release's row-addressed stream)."""
        raise NotImplementedError(self.second_layer_refusal)

    def rerandomize(self, reports: list[pa.Array], words: np.ndarray, epsilon2: float) -> list[pa.Array]:
        """The second layer: this mechanism's (permanent) ``reports``, as ``randomize`` wrote them,
        re-randomized at eps ``epsilon2`` with ``words`` of shape (n, second_layer_words_per_row);
        returns the composite's reports (same fields)."""
        raise NotImplementedError(self.second_layer_refusal)

    def second_layer_ratio(self, epsilon2: float) -> Fraction:
        """The exact worst likelihood ratio of this mechanism followed by a second layer at
        ``epsilon2`` (mechanisms that support a second layer)."""
        raise NotImplementedError(self.second_layer_refusal)

    def composite_epsilon(self, epsilon2: float) -> float:
        """The exact eps of the composite channel (this mechanism, then the second layer at
        ``epsilon2``), computed from the probabilities both samplers realize; at most
        min(eps, epsilon2)."""
        raise NotImplementedError(self.second_layer_refusal)

    def with_second_layer(self, epsilon2: float) -> Mechanism:
        """The composite channel as a mechanism of this class at the composite eps (its reports
        have exactly the composite's distribution, so the family decoder reads them unbiasedly),
        remembering both layers (``second_layer_of``, and ``second_layer`` in its spec)."""
        if not self.supports_second_layer:
            raise PolicyError(self.second_layer_refusal)
        if self.second_layer_of is not None:
            raise PolicyError(f"mechanism {self.name}: already has a second layer")
        eps2 = check_epsilon(epsilon2, f"mechanism {self.name}, second layer")
        spec = dict(self.to_spec())
        spec["epsilon"] = self.composite_epsilon(eps2)
        composite = type(self).from_spec(spec)
        composite.second_layer_of = (self, eps2)
        return composite

    @property
    def permanent(self) -> Mechanism:
        """The mechanism the memoized words go through: the permanent layer of a composite, else itself."""
        return self.second_layer_of[0] if self.second_layer_of is not None else self

    def _layer_spec(self, spec: dict[str, Any]) -> dict[str, Any]:
        """``spec`` with the two layers of a composite (nothing added otherwise)."""
        if self.second_layer_of is not None:
            spec["second_layer"] = {"permanent_epsilon": self.second_layer_of[0].epsilon,
                                    "epsilon": self.second_layer_of[1]}
        return spec

    # -- goodness of fit (mechanisms/fit.py) -----------------------------------------
    def fit_test(self) -> FitStats | None:
        """A fresh goodness-of-fit accumulator for this mechanism's reports, or None when no
        test is available (``no_fit_reason`` says why)."""
        return None

    def no_fit_reason(self) -> str:
        """Why ``fit_test`` gives no test ('' when it gives one)."""
        if self.fit_test() is not None:
            return ""
        return (f"no goodness-of-fit test for mechanism {self.name!r}: this module knows neither a "
                "data-independent feature of its reports nor how to map its reports onto a finite channel")

    # -- planning (plan.py) ----------------------------------------------------------
    def fixed_epsilon(self) -> float | None:
        """The eps this mechanism's noise gives whatever eps is declared (a mechanism whose noise is
        fixed by its own parameters, such as a supplied transition matrix), or None when the noise
        follows the declared eps."""
        return None

    def fixed_noise_note(self, meets: bool, rows: int) -> str:
        """plan --suggest's note for a mechanism with a ``fixed_epsilon``: whether its fixed noise
        meets the column's targets at ``rows`` rows."""
        actual = self.fixed_epsilon()
        if meets:
            return f"the mechanism gives eps {actual:.4g}; its precision does not depend on the declared eps"
        return (f"the mechanism's parameters fix the noise (it gives eps {actual:.4g}); it misses the target at "
                f"{rows} rows at any declared eps: more rows or less noisy parameters are needed")

    def mean_row_variance(self) -> float | None:
        """n * Var of the mean as ``ldpt estimate`` reports it, worst case over data (column units
        squared); None for a mechanism whose mean has no predicted SE."""
        return None

    def frequency_row_variance(self) -> float | None:
        """n * (mean over values of Var of a share) as ``ldpt estimate`` reports it, worst case over
        data; None for a mechanism that does not estimate frequencies."""
        return None

    def efficiency(self) -> float | None:
        """The lower bound (mechanisms/bounds.py) over this mechanism's own variance (1 = as good as
        possible); None where no bound applies."""
        return None

    def grouped_mean_refusal(self) -> str:
        """Why this mechanism's per-row value reports cannot be averaged within the groups of another
        column (``ldpt estimate --mean-by``); '' when they can."""
        return ""

    def missing_share_row_variance(self, missing_code: int | None) -> float | None:
        """n * Var of the share missing as ``ldpt estimate`` reports it, worst case over data, for a
        column with ``missing: as-answer`` (``missing_code``: the code of its <missing> category, for
        a column released as categories); None for a mechanism that releases no such share."""
        return None

    # -- empirical audit (audit.py) --------------------------------------------------
    def audit_pairs(self) -> list[tuple[Any, Any]]:
        """Worst-case pairs of inputs for the empirical audit (``ldpt audit``): encoded inputs as
        ``randomize`` receives them (a category code, or a value in column units), two whose
        report distributions differ most.  Default: the codes 0 and 1 (for a mechanism that treats
        its categories alike, every pair of distinct categories is a worst case); the mean and
        distribution bases give the two bounds; a mechanism with an uneven channel picks its pairs
        from it (``worst_channel_pairs``)."""
        return [(0, 1)]

    def audit_ordered(self) -> bool:
        """True when the keys of ``audit_outcomes`` are numbers whose order means something, so that
        the audit also tries intervals of them as events.  Default: the report is one numeric field."""
        fields = self.output_fields("x")
        return len(fields) == 1 and (pa.types.is_integer(fields[0].type) or pa.types.is_floating(fields[0].type))

    def audit_outcomes(self, arrays: list[pa.Array], pair: tuple[Any, Any]) -> np.ndarray:
        """One outcome key per report row, for the audit of the input pair ``pair``: the audit's
        events are sets of keys, so the keys must keep what tells the two inputs apart (rows that
        did not report are removed before).  Numbers (float64) when ``audit_ordered``, else text.
        Default: the reported number itself, or the report's fields joined as text (each distinct
        report is an outcome: right for a small output alphabet; mechanisms with per-row public
        parts such as a hash seed reduce the report to what it says about the pair)."""
        if self.audit_ordered():
            arr = arrays[0].combine_chunks() if isinstance(arrays[0], pa.ChunkedArray) else arrays[0]
            return np.asarray(arr.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype=float)
        texts = [_as_text(a) for a in arrays]
        joined = texts[0] if len(texts) == 1 else pc.binary_join_element_wise(*texts, "\x1f")
        return np.asarray(joined.to_numpy(zero_copy_only=False), dtype=object)


class MeanMechanism(Mechanism):
    """Bounded numeric input on [lo, hi], decoded as a mean: each written value is a per-row
    unbiased estimate of the row's value (column units).  Subclasses give the exact variance of
    one report (``variance``) and its worst case over the bounds (``worst_variance``)."""

    kind: ClassVar[str] = "numeric"
    family: ClassVar[str] = "mean"
    lo: float
    hi: float

    @abstractmethod
    def variance(self, x: np.ndarray | float) -> Any:
        """Exact Var of one report (column units) for true value(s) x."""

    @abstractmethod
    def worst_variance(self) -> float:
        """Largest Var of one report over [lo, hi] (column units)."""

    def decoder(self, *, joint: bool = False) -> MeanDecoder:
        """n, sum and sum of squares of the written values (each a row's unbiased estimate)."""
        return MeanDecoder(self)

    def per_row_columns(self, column: str) -> list[PerRowColumn]:
        """One column of the input's name: the written value, the row's unbiased estimate."""
        return [PerRowColumn(column, f"unbiased estimate of the row's {column} (column units, as the release "
                                     f"encoded it): its mean over rows estimates the mean of {column}")]

    def per_row_values(self, arrays: list[pa.Array]) -> np.ndarray:
        """The written values (what ``MeanDecoder`` sums)."""
        return numeric_values(arrays)[:, None]

    def mean_row_variance(self) -> float:
        """Worst case over data of n * Var of the mean as ``ldpt estimate`` reports it (the spread of
        the per-row estimates, which also counts the spread of the true values): data split evenly
        between the two bounds, the report variance at the worse bound plus the spread (hi-lo)^2/4."""
        half = (self.hi - self.lo) / 2.0
        return float(max(self.variance(self.lo), self.variance(self.hi))) + half * half

    def efficiency(self) -> float:
        """Lower bound on the worst-case variance of any unbiased eps-LDP mean estimate over this
        mechanism's worst-case variance of one report (mechanisms/bounds.py)."""
        from .bounds import mean_lower_bound

        return mean_lower_bound(self.epsilon, (self.lo, self.hi)) / self.worst_variance()

    def audit_pairs(self) -> list[tuple[Any, Any]]:
        """The two bounds: the inputs furthest apart (a report's distribution moves most between them)."""
        return [(self.lo, self.hi)]


class DistributionMechanism(Mechanism):
    """Bounded numeric input on [lo, hi], decoded as a whole distribution (CDF, quantiles, range
    shares): reports summarize into additive integer count vectors (``new_stats``, ``add_stats``,
    additive across batches and files) that ``decode`` turns into a
    ``ldptransform.distribution.Distribution``.  Its mean is read off the decoded distribution
    (no per-row estimate, no predicted SE)."""

    kind: ClassVar[str] = "distribution"
    family: ClassVar[str] = "distribution"
    lo: float
    hi: float
    #: (``Mechanism.per_row_reason``) a whole distribution is decoded, not an average of per-row values
    per_row_reason: ClassVar[str] = ("its reports are decoded as a whole distribution, not as an average of "
                                     "per-row values")

    @abstractmethod
    def new_stats(self) -> np.ndarray:
        """Zeroed sufficient statistics (int64)."""

    @abstractmethod
    def add_stats(self, stats: np.ndarray, arrays: list[pa.Array]) -> None:
        """Add the reports in ``arrays`` to ``stats`` in place."""

    @abstractmethod
    def decode(self, stats: np.ndarray, n: int) -> Any:
        """The decoded ``Distribution`` of n reports with statistics ``stats``."""

    def decoder(self, *, joint: bool = False) -> DistributionDecoder:
        """The additive count statistics (``new_stats``), decoded by ``decode``."""
        return DistributionDecoder(self)

    #: True for a mechanism that can carry a missing flag (``missing: as-answer`` without bins,
    #: mechanisms/missing.py): its decoded bucket shares are linear in per-row unbiased estimates, so
    #: their covariance with the flag's present share follows from its statistics split by the flag
    #: (``flag_cross_covariance``) and ``bucket_of`` says which bucket holds a value.
    supports_missing_flag: ClassVar[bool] = False
    missing_flag_reason: ClassVar[str] = ""

    def bucket_of(self, x: np.ndarray) -> np.ndarray:
        """The decoded distribution's bucket of each value (mechanisms with ``supports_missing_flag``)."""
        raise NotImplementedError(self.missing_flag_reason)

    def flag_cross_covariance(self, groups: list[tuple[np.ndarray, float]], n: int) -> np.ndarray:
        """Cov(decoded bucket shares, mean of u) where u is a per-row estimate taking the value u_g on
        the rows whose statistics are ``groups`` [(stats_g, u_g)] (mechanisms with
        ``supports_missing_flag``): the rows' sample covariance, as the SEs of the tool are."""
        raise NotImplementedError(self.missing_flag_reason)

    def audit_pairs(self) -> list[tuple[Any, Any]]:
        """The two bounds: the inputs furthest apart (a report's distribution moves most between them)."""
        return [(self.lo, self.hi)]


def _as_text(arr: pa.Array | pa.ChunkedArray) -> pa.Array:
    """A report field as plain text (dictionary-encoded labels decoded; nulls as the empty text)."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    return pc.fill_null(arr.cast(pa.string()), "")


def worst_channel_pairs(channel: np.ndarray, inputs: Sequence[Any], top: int = 2) -> list[tuple[Any, Any]]:
    """The audit's worst-case input pairs read off an exact channel ``channel[i, y]`` = P(y | inputs[i]):
    the pairs (i, j) whose largest ratio P(y|i)/P(y|j) is largest, ties broken by the probability
    P(y|i) of that output (an event the audit sees often); at most ``top`` pairs, each unordered
    pair once (the audit tests both directions).  One pass per input i over the k x M channel."""
    Q = np.asarray(channel, dtype=float)
    k = Q.shape[0]
    best = np.full((k, k), -1.0)
    weight = np.zeros((k, k))
    for i in range(k):
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.where(Q[i][None, :] > 0, Q[i][None, :] / Q, 0.0)       # (j, y)
        r = np.where(np.isnan(r), 0.0, r)
        y = r.argmax(axis=1)
        best[i] = r[np.arange(k), y]
        weight[i] = Q[i, y]
    np.fill_diagonal(best, -1.0)
    order = np.lexsort((-weight.ravel(), -best.ravel()))
    out: list[tuple[Any, Any]] = []
    seen: set[frozenset[int]] = set()
    for flat in order[: 4 * top + 2 * k]:
        i, j = divmod(int(flat), k)
        if i == j or frozenset((i, j)) in seen:
            continue
        seen.add(frozenset((i, j)))
        out.append((inputs[i], inputs[j]))
        if len(out) >= top:
            break
    return out
