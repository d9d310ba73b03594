"""Conformance suite: every registered mechanism against the one contract of
ldptransform/mechanisms/base.py.

Each test is parametrized over ``registry()`` (ids = mechanism names), so a newly registered
mechanism is tested by every check here as soon as it has an entry in ``EXAMPLES`` below, and
``test_every_registered_mechanism_has_an_example`` fails until it has one.  The example is a
small representative instance built through the policy path (``from_policy``) from the
mechanism's family (5 categories for a frequency oracle, bounds (0, 100) otherwise) and a few
values of its ``Params``.

Checks (tolerances stated where they are defined):

1. spec round trip (also through JSON); a spec of another mechanism or family is refused;
2. the channel within eps: ``max_log_ratio() <= eps (1 + 1e-12)``; the exact channel matrix
   (``channel()``, or the example's for a mechanism without one) has rows summing to 1 and a
   largest column ratio at most e^eps, equal to e^max_log_ratio();
3. exact unbiasedness where it can be stated exactly (frequency oracles: channel @ per-row
   estimator = identity; mean mechanisms: E[written value | grid point] = the grid point);
4. Monte Carlo through the mechanism's decoder (``Mechanism.decoder``): estimate within 5 SE
   of the truth, and the decoder's variance of the per-row estimates within 10% of the exact
   formula (distribution mechanisms, which have none: CDF at the quartiles within 5 SE);
5. the output alphabet: ``count_invalid`` is 0 on real reports and counts corrupted rows;
6. batch and slicing invariance (a hypothesis property: any first row, any split points);
7. pickling (the dask engine ships mechanisms to workers): same spec, same outputs;
8. decoder merge = decoder of the concatenation;
9. the fit test's false-alarm rate over honest releases (marked slow);
10. output fields: names, arrow types, a meaning for each, the family.

The steward-side ``validate`` with raw data and key on one release per mechanism is in
tests/test_validate_steward.py; class-level contract checks (Params models, listings, the
no-name-outside-mechanisms rule) are in tests/test_mechanisms.py; the published formulas are
in the per-mechanism files and tests/reference/.

Randomness: PRF words under the fixed test key (``conftest.keyed_words``, stream
"conformance", one label per mechanism and check), so every statistical check is
deterministic; numpy's generator (fixed seeds) only makes input data.
"""

from __future__ import annotations

import json
import math
import pickle
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from conftest import FIXED_KEY_BYTES, FIXED_NONCE, keyed_words
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from ldptransform.errors import PolicyError
from ldptransform.keys import SecretKey
from ldptransform.mechanisms import FAMILIES, Mechanism, build, registry
from ldptransform.random import KeyedStream
from ldptransform.random.variates import exp_lower_bound

STREAM = "conformance"
words_for = partial(keyed_words, stream=STREAM)
K_CATEGORIES = 5
BOUNDS = (0.0, 100.0)
EPS_SLACK = 1e-12            # relative float slack on eps and e^eps (check 2)
MC_ROWS = 30_000             # Monte Carlo rows per mechanism (check 4)
MC_SE = 5.0                  # estimate within this many standard errors of the truth
MC_VAR_REL = 0.10            # decoder's variance of per-row estimates within 10% of the exact value
MC_VAR_RESOLUTION = 4.0      # ... and 10% must be at least 4 SDs of that variance estimate
MC_SMOOTHED_ABS = 0.04       # a smoothed decoder without SE: CDF within 0.04 of the truth (measured: at most 0.019)


# -- the factory: one small representative instance per registered mechanism --------------------

def distance_matrix(eps: float, k: int) -> list[list[float]]:
    """A transition matrix for ``matrix`` that is not GRR: P[x, y] proportional to
    exp(-eps |x - y| / (k - 1)).  Its worst column ratio is e^eps (the corner columns);
    check 2 verifies it on the realized channel."""
    a = eps / (k - 1)
    d = np.abs(np.arange(k)[:, None] - np.arange(k)[None, :])
    P = np.exp(-a * d)
    return (P / P.sum(axis=1, keepdims=True)).tolist()


def _unary_outputs(m: Any) -> list[pa.Array]:
    """All 2^k bit strings in the column order of ``channel()``: character i = bit i of j."""
    return [pa.array(["".join("1" if (j >> i) & 1 else "0" for i in range(m.k)) for j in range(2 ** m.k)])]


def _frequency_unbiasedness(outputs: Callable[[Any], list[pa.Array]]) -> Callable[[Any], tuple[Any, Any]]:
    """E[per-row estimate of value v | input x] over the whole output alphabet (the columns of
    ``channel()``, enumerated by ``outputs``), and what it must equal: the indicator 1[x = v]."""
    def check(m: Any) -> tuple[np.ndarray, np.ndarray]:
        est = m.row_estimates(outputs(m))
        return m.channel() @ est, np.eye(m.k)
    return check


def _grid_unbiasedness(m: Any) -> tuple[np.ndarray, np.ndarray]:
    """Grid mechanisms: E[written value | grid point i] and the grid point (column units)."""
    return m.channel() @ m.output_values, m.to_units(m.inputs)


def _lattice_unbiasedness(m: Any) -> tuple[np.ndarray, np.ndarray]:
    """discrete-laplace: E[written value | grid index i] from the exact report pmf over the
    lattice lo + y step, |y - i| <= T with the tails beyond T below 1e-17, and the grid point."""
    T = int(math.ceil(40.0 / m.noise_rate))
    i = np.arange(m.grid + 1)
    y = np.arange(-T, m.grid + T + 1)
    P = m.report_pmf(y[None, :], i[:, None])
    assert np.all(np.abs(P.sum(axis=1) - 1.0) <= 1e-12)
    return P @ (m.lo + y * m.step), m.lo + i * m.step


def _olh_given_seeds(o: Any, n_seeds: int = 200) -> np.ndarray:
    """olh: P(seed, y | x) over the seeds of ``n_seeds`` reports of its own (each equally likely,
    the seed written out with the report): columns (seed, bucket); exact given the seeds."""
    seeds = np.asarray(o.randomize(np.zeros(n_seeds, dtype=np.int64),
                                   words_for("channel/olh-seeds", n_seeds, o.words_per_row))[0]
                       .to_numpy()).astype(np.uint64)
    Q = o.channel_given_seeds(seeds)                      # (seed, x, y)
    return Q.transpose(1, 0, 2).reshape(o.k, -1) / n_seeds


def _hierarchy_channel(m: Any) -> np.ndarray:
    """hierarchy: P(level l, report | leaf) = P(l) P_l(report | node of the leaf at level l), the
    level drawn from the PRF alone (taken as 1/h: its law does not depend on the data, so it
    scales every input's column alike); grr levels exact, olh levels given seeds."""
    leaves = np.arange(m.leaves)
    blocks = []
    for level, o in enumerate(m.oracles):
        node = leaves // (m.branching ** (m.height - level - 1))
        C = o.channel() if hasattr(o, "channel") else _olh_given_seeds(o)
        blocks.append(C[node] / m.height)
    return np.concatenate(blocks, axis=1)


def _lattice_channel(m: Any) -> np.ndarray:
    """discrete-laplace: the exact channel from grid index to lattice cell, cells -T..G+T exact
    and each tail beyond them pooled into one cell (as its fit test builds it): a coarsening only
    of outputs whose every ratio is exactly e^eps."""
    fit = m.fit_test()
    return np.asarray(fit.Q)


def _bit_unbiasedness(m: Any) -> tuple[np.ndarray, np.ndarray]:
    """sequential-quantile: E[debiased bit (z - (1-p)) / (2p-1) | value above / at most the threshold]
    over the exact channel, and the indicator 1[value <= threshold] (0, 1)."""
    p = m.truth_probability
    return m.channel() @ ((np.array([0.0, 1.0]) - (1.0 - p)) / (2.0 * p - 1.0)), np.array([0.0, 1.0])


@dataclass(frozen=True)
class Example:
    """How the suite builds one mechanism: eps, its policy fields (``Params``), and its
    statement of exact unbiasedness (a function giving (E[estimate | input], truth)) or the
    reason none is stated here."""

    eps: float
    params: dict[str, Any] = field(default_factory=dict)
    unbiased: Callable[[Any], tuple[Any, Any]] | None = None
    no_exact_mean: str = ""
    #: an exact finite channel (inputs x outputs) for a mechanism without ``channel()``
    channel: Callable[[Any], np.ndarray] | None = None


EXAMPLES: dict[str, Example] = {
    "grr": Example(1.0, unbiased=_frequency_unbiasedness(lambda m: [pa.array(m.categories)])),
    "oue": Example(1.5, unbiased=_frequency_unbiasedness(_unary_outputs)),
    "sue": Example(1.0, unbiased=_frequency_unbiasedness(_unary_outputs)),
    "olh": Example(2.0, channel=_olh_given_seeds, no_exact_mean=(
        "exact only on average over all (P-1) P hash seeds: tests/test_mechanisms.py "
        "(test_olh_exactly_unbiased_over_all_hash_seeds) enumerates them with a small prime")),
    "hadamard": Example(1.0, unbiased=_frequency_unbiasedness(
        lambda m: [pa.array(np.arange(m.K, dtype=np.int32))])),
    "subset": Example(1.5, unbiased=_frequency_unbiasedness(lambda m: [pa.array(m.channel_outputs())])),
    "matrix": Example(2.0, {"matrix": distance_matrix(2.0, K_CATEGORIES)},
                      unbiased=_frequency_unbiasedness(lambda m: [pa.array(m.categories)])),
    "two-point": Example(1.0, unbiased=_grid_unbiasedness),
    "piecewise": Example(1.0, {"grid": 64}, unbiased=_grid_unbiasedness),
    "hybrid": Example(1.5, {"grid": 64}, unbiased=_grid_unbiasedness),
    "discrete-laplace": Example(2.0, {"grid": 32}, unbiased=_lattice_unbiasedness, channel=_lattice_channel),
    "square-wave": Example(1.0, {"grid": 32}, no_exact_mean=(
        "decoded by EMS, biased toward smoothness by design; no unbiased estimator to check")),
    "sequential-quantile": Example(1.0, {"quantile": 0.5}, unbiased=lambda m: _bit_unbiasedness(m)),
    "hierarchy": Example(1.0, {"branching": 4, "leaves": 16}, channel=_hierarchy_channel, no_exact_mean=(
        "unbiased through its level oracles (grr, olh and subset, checked as such) and a linear consistency "
        "step")),
}

NAMES = sorted(registry())


def example(name: str) -> Mechanism:
    """The suite's instance of mechanism ``name``, built as a policy column builds it."""
    assert name in EXAMPLES, (f"mechanism {name!r} is registered but has no example in "
                              "tests/conformance/test_conformance.py: add one to EXAMPLES")
    ex = EXAMPLES[name]
    cls = registry()[name]
    domain: Any = [f"c{i}" for i in range(K_CATEGORIES)] if cls.family == "frequency" else BOUNDS
    return cls.from_policy(ex.eps, domain, ex.params)


def skewed_input(m: Mechanism, n: int, seed: int) -> np.ndarray:
    """Fixed skewed inputs: codes with shares proportional to 0.55^v (frequency oracles), or
    100 * Beta(2, 5) with 2% of the rows at each bound (numeric mechanisms)."""
    rng = np.random.default_rng(seed)
    if m.family == "frequency":
        w = 0.55 ** np.arange(m.k)  # type: ignore[attr-defined]
        return rng.choice(m.k, size=n, p=w / w.sum()).astype(np.int64)  # type: ignore[attr-defined]
    lo, hi = m.lo, m.hi  # type: ignore[attr-defined]
    x = lo + (hi - lo) * rng.beta(2.0, 5.0, size=n)
    x[: n // 50] = lo
    x[n // 50: n // 25] = hi
    return rng.permutation(x)


def draw_stream(label: str) -> KeyedStream:
    """The keyed stream behind the draw function of a variable-draw mechanism."""
    return KeyedStream(SecretKey(FIXED_KEY_BYTES), FIXED_NONCE, STREAM, label + "/draws")


def release(m: Mechanism, x: np.ndarray, label: str, row0: int = 0) -> list[pa.Array]:
    """Randomize ``x`` as global rows row0.. of the stream ``label``, as the release does: the
    fixed words of those rows, and for variable-draw mechanisms a draw function addressed by
    global row."""
    words = words_for(label, len(x), m.words_per_row, row0)
    if not m.variable_draws:
        return m.randomize(x, words)
    ds = draw_stream(label)
    return m.randomize_with(x, words, lambda r, j: ds.words_at(row0 + r, j))


def as_lists(arrays: list[pa.Array]) -> list[list[Any]]:
    out = []
    for a in arrays:
        if pa.types.is_dictionary(a.type):
            a = a.dictionary_decode()
        out.append(a.to_pylist())
    return out


def decoded(m: Mechanism, dec: Any) -> dict[str, np.ndarray]:
    """The decoder's result as arrays: estimates and SEs (frequency oracles, means), or the
    decoded bucket masses (distribution mechanisms)."""
    if m.family == "frequency":
        est, se = dec.estimates()
        return {"estimate": np.asarray(est), "se": np.asarray(se)}
    if m.family == "mean":
        r = dec.mean(1.96)
        return {"estimate": np.array([r.estimate]), "se": np.array([r.se])}
    if m.family == "quantile":
        return {"stats": np.asarray(dec.stats, dtype=float)}
    dist = dec.distribution()
    return {"mass": np.asarray(dist.mass)} | ({} if dist.cov is None else {"cov": np.asarray(dist.cov)})


def decode(m: Mechanism, arrays: list[pa.Array]) -> Any:
    """The mechanism's own decoder (``Mechanism.decoder``) filled with ``arrays``."""
    dec = m.decoder()
    assert dec.family == m.family and dec.n == 0
    dec.add(arrays)
    return dec


# -- 0. the factory covers the registry ---------------------------------------------------------

def test_every_registered_mechanism_has_an_example() -> None:
    missing = sorted(set(registry()) - set(EXAMPLES))
    assert not missing, f"registered mechanisms without an example in EXAMPLES: {missing}"
    assert not set(EXAMPLES) - set(registry()), "EXAMPLES names a mechanism that is not registered"
    for name, ex in EXAMPLES.items():
        assert (ex.unbiased is None) == bool(ex.no_exact_mean), f"{name}: give an unbiasedness check or a reason"


# -- 1. spec round trip ---------------------------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_spec_round_trip_and_refusals(name: str) -> None:
    m = example(name)
    spec = m.to_spec()
    assert spec["mechanism"] == name and spec["epsilon"] == EXAMPLES[name].eps
    assert build(spec).to_spec() == spec
    again = build(json.loads(json.dumps(spec)))          # the manifest stores the spec as JSON
    assert type(again) is type(m) and again.to_spec() == spec
    assert again.words_per_row == m.words_per_row and again.max_log_ratio() == m.max_log_ratio()
    for other in NAMES:
        if other == name:
            continue
        with pytest.raises(PolicyError):
            type(m).from_spec(example(other).to_spec())  # another mechanism's (or family's) real spec
        with pytest.raises(PolicyError):
            type(m).from_spec({**spec, "mechanism": other})
    with pytest.raises(PolicyError):
        build({**spec, "mechanism": "no-such-mechanism"})


# -- 2. the channel within eps --------------------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_channel_within_eps(name: str) -> None:
    """max_log_ratio() <= eps (1 + 1e-12).  The exact channel matrix (``channel()``, or for olh,
    hierarchy and discrete-laplace the example's: given seeds, per level, tails pooled): entries >= 0,
    rows sum to 1 within 1e-12, an output possible for one input is possible for all, the
    largest column ratio max_x Q[x, y] / min_x Q[x, y] is at most e^eps (1 + 1e-12) and its log
    equals max_log_ratio() within 1e-9 (the analytic value is the channel's actual worst ratio)."""
    m = example(name)
    eps = m.epsilon
    assert m.max_log_ratio() <= eps * (1 + EPS_SLACK), (m.max_log_ratio(), eps)
    own = getattr(m, "channel", None)
    special = EXAMPLES[name].channel
    assert (own is None) != (special is None), f"{name}: give the example a channel, or only the mechanism's"
    if own is not None:
        Q = np.asarray(own())
    else:
        assert special is not None
        Q = np.asarray(special(m))
    assert Q.ndim == 2 and (Q >= 0).all()
    np.testing.assert_allclose(Q.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    used = Q.max(axis=0) > 0
    assert (Q[:, used].min(axis=0) > 0).all(), "an output possible for one input is impossible for another"
    ratio = float(np.max(Q[:, used].max(axis=0) / Q[:, used].min(axis=0)))
    assert ratio <= math.exp(eps) * (1 + EPS_SLACK), (ratio, math.exp(eps))
    assert math.log(ratio) == pytest.approx(m.max_log_ratio(), abs=1e-9)
    # the channel the sampler's integers realize, exactly (docs/formulas.md section 10.4; the
    # grid of eps and domain sizes is in tests/conformance/test_exact_channel.py)
    realized = m.realized_ratio()
    assert (realized is None) == (name in NO_REALIZED_RATIO), name
    if realized is not None:
        assert realized <= exp_lower_bound(eps)
        assert math.log(realized) == pytest.approx(m.max_log_ratio(), abs=1e-9)


#: Mechanisms without an exact realized ratio: discrete-laplace samples by exact rejection (its
#: eps is exact by construction, docs/formulas.md section 10.3), not with integer thresholds.
NO_REALIZED_RATIO = {"discrete-laplace"}


# -- 3. exact unbiasedness ------------------------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_exact_unbiasedness(name: str) -> None:
    """Frequency oracles: sum_y P(y | x) u_v(y) = 1[x = v] over the whole output alphabet, within
    1e-9.  Mean mechanisms: E[written value | grid point] = the grid point within 1e-10 of the
    bounds' width (the realized channel's masses are whole multiples of 2^-50, so the mean may
    sit ~1e-12 off).  Mechanisms where it cannot be stated exactly say why (a skip)."""
    ex = EXAMPLES[name]
    if ex.unbiased is None:
        pytest.skip(ex.no_exact_mean)
    m = example(name)
    expected, truth = ex.unbiased(m)
    scale = 1.0 if m.family == "frequency" else (m.hi - m.lo)  # type: ignore[attr-defined]
    tol = 1e-9 if m.family == "frequency" else 1e-10 * scale
    np.testing.assert_allclose(expected, truth, rtol=0, atol=tol)


# -- 4. Monte Carlo through the decoder -----------------------------------------------------------

def _variance_resolution(rows: np.ndarray) -> np.ndarray:
    """Relative SD of the sample variance of ``rows`` (per column): sqrt((m4 / s^4 - 1) / n),
    with the sample's own central moments (the chi-square-like spread of a variance estimate)."""
    c = rows - rows.mean(axis=0)
    s2 = (c ** 2).mean(axis=0)
    m4 = (c ** 4).mean(axis=0)
    return np.sqrt((m4 / s2 ** 2 - 1.0) / rows.shape[0])


def _mc_frequency(m: Any, x: np.ndarray, arrays: list[pa.Array], dec: Any) -> None:
    n = len(x)
    f = np.bincount(x, minlength=m.k) / n
    out = decoded(m, dec)
    exact = np.asarray(m.variance(f), dtype=float)    # n Var of each share, fixed data
    z = (out["estimate"] - f) / np.sqrt(exact / n)
    assert np.all(np.abs(z) <= MC_SE), z
    # the decoder's SE is the sample SD of the per-row estimates u_v over sqrt(n); for fixed data
    # E[sample variance] = (sum_i (1[x_i = v] - f_v)^2 + (1 - 1/n) sum_i Var u_v,i) / (n - 1)
    expected = (n * f * (1 - f) + (n - 1) * exact) / (n - 1)
    got = n * out["se"] ** 2
    rel_sd = _variance_resolution(m.row_estimates(arrays))
    assert np.all(MC_VAR_REL >= MC_VAR_RESOLUTION * rel_sd), rel_sd
    assert np.all(np.abs(got / expected - 1) <= MC_VAR_REL), got / expected


def _mc_mean(m: Any, x: np.ndarray, arrays: list[pa.Array], dec: Any) -> None:
    n = len(x)
    out = decoded(m, dec)
    var = np.asarray(m.variance(x), dtype=float)      # exact Var of each report
    z = (out["estimate"][0] - x.mean()) / math.sqrt(var.mean() / n)
    assert abs(z) <= MC_SE, z
    expected = (((x - x.mean()) ** 2).sum() + (1 - 1 / n) * var.sum()) / (n - 1)
    got = n * float(out["se"][0]) ** 2
    vals = np.asarray(arrays[0].to_numpy(zero_copy_only=False), dtype=float)
    rel_sd = float(_variance_resolution(vals[:, None])[0])
    assert MC_VAR_REL >= MC_VAR_RESOLUTION * rel_sd, rel_sd
    assert abs(got / expected - 1) <= MC_VAR_REL, got / expected


def _mc_distribution(m: Any, x: np.ndarray, arrays: list[pa.Array], dec: Any) -> None:
    """No exact variance formula: the CDF at the quartiles of the bounds within 5 SE (the exact-
    covariance SE where the decoder gives one) of what the decoded masses estimate for these rows
    (``Distribution.bucket_counts``); a smoothed decoder that states no interval within
    MC_SMOOTHED_ABS of it instead (fixed keys: the same reports every run)."""
    from ldptransform.distribution import Distribution

    dist = dec.distribution()
    truth = Distribution(dist.edges, dist.bucket_counts(x) / len(x), method="truth", n=len(x),
                         centers=dist.centers)
    for b in np.linspace(m.lo, m.hi, 5)[1:-1]:
        ci = dist.range_ci(m.lo, float(b))
        err = ci.estimate - truth.range_share(m.lo, float(b))
        if ci.se is None:  # a smoothed decoder that states no interval (its bias has no bound)
            assert math.isnan(ci.lo) and ci.method.startswith("no interval"), ci
            assert abs(err) <= MC_SMOOTHED_ABS, (b, err, ci)
            continue
        assert ci.se > 0
        z = err / ci.se
        assert abs(z) <= MC_SE, (b, z, ci)


def _mc_quantile(m: Any, x: np.ndarray, arrays: list[pa.Array], dec: Any) -> None:
    """A sequential mechanism randomized without a release's phases (every row as of phase 0, whose
    two thresholds are fixed by the spec): the debiased share of reports below each threshold within
    5 exact SEs of the share of its rows whose value is at most it (the phases themselves are
    tested through releases in tests/test_sequential_quantile.py)."""
    p = m.truth_probability
    side = np.asarray(arrays[1].to_numpy(zero_copy_only=False)) % 2
    for s, theta in enumerate(m.setting(m.new_stats(), [], 0).thresholds()):
        n, c = dec.stats[0, s]
        truth = float(np.mean(x[side == s] <= theta))
        est = (c / n - (1 - p)) / (2 * p - 1)
        P = (1 - p) + (2 * p - 1) * truth
        assert abs(est - truth) <= MC_SE * math.sqrt(P * (1 - P) / n) / (2 * p - 1), (s, est, truth)


@pytest.mark.parametrize("name", NAMES)
def test_monte_carlo(name: str) -> None:
    """30000 rows of fixed skewed input, decoded by the mechanism's decoder.  Frequency oracles
    and mean mechanisms: (a) the estimate within 5 exact SEs of the truth; (b) the decoder's
    variance of the per-row estimates (n SE^2) within 10% of its exact expectation (the exact
    variance formula plus the spread of the true values).  The 10% is checked to be at least 4
    SDs of that variance estimate (its relative SD sqrt((kurtosis - 1) / n), about 0.01 here), so
    the check has teeth without being noisy.  Distribution mechanisms: see ``_mc_distribution``.
    The output alphabet is checked on the same reports (check 5)."""
    m = example(name)
    x = skewed_input(m, MC_ROWS, seed=4)
    arrays = release(m, x, f"mc/{name}")
    assert m.count_invalid(arrays) == 0
    dec = decode(m, arrays)
    assert dec.n == MC_ROWS
    {"frequency": _mc_frequency, "mean": _mc_mean, "distribution": _mc_distribution,
     "quantile": _mc_quantile}[m.family](m, x, arrays, dec)


# -- 5. the output alphabet -----------------------------------------------------------------------

def _corrupt(arr: pa.Array, rows: list[int]) -> tuple[pa.Array, list[int]]:
    """``arr`` with values that no report can hold at ``rows`` (by arrow type: a label outside any
    category list or a string of another length, a negative index, a non-finite or off-alphabet
    float: halfway between the two closest values written); returns the corrupted array and the
    rows changed."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    vals = arr.to_pylist()
    t = arr.type
    for i, r in enumerate(rows):
        if (pa.types.is_string(t) or pa.types.is_large_string(t)) and vals[r] is None:
            vals[r] = "0" * (i + 1)     # a field only some rows fill (hierarchy's subset levels): any text
        elif pa.types.is_string(t) or pa.types.is_large_string(t):
            vals[r] = ["no-such-category", vals[r] + "0", "2" * len(vals[r])][i % 3]
        elif pa.types.is_integer(t):
            vals[r] = -1 - i
        elif pa.types.is_floating(t):
            distinct = np.unique(np.asarray(vals, dtype=float))
            j = int(np.argmin(np.diff(distinct)))   # halfway between the two closest values written
            vals[r] = [math.nan, math.inf, float(distinct[j] + distinct[j + 1]) / 2][i % 3]
        else:
            raise AssertionError(f"no corruption for arrow type {t}")
    return pa.array(vals, type=t), rows


@pytest.mark.parametrize("name", NAMES)
def test_output_alphabet(name: str) -> None:
    """count_invalid is 0 on 600 real reports; corrupting 3 rows of one output field at a time
    makes it count exactly those 3 rows (every mechanism's alphabet is restricted)."""
    m = example(name)
    x = skewed_input(m, 600, seed=5)
    arrays = release(m, x, f"alphabet/{name}")
    assert m.count_invalid(arrays) == 0
    for f in range(len(arrays)):
        bad, rows = _corrupt(arrays[f], [7, 100, 333])
        corrupted = list(arrays)
        corrupted[f] = bad
        assert m.count_invalid(corrupted) == len(rows), (m.output_fields("col")[f], as_lists([bad])[0][7])


# -- 6. batch and slicing invariance ---------------------------------------------------------------

SLICE_ROWS = 240
SLICE_INPUTS = {name: skewed_input(example(name), SLICE_ROWS, seed=6) for name in NAMES}


@pytest.mark.parametrize("name", NAMES)
@settings(max_examples=25, deadline=None, derandomize=True, database=None)
@given(data=st.data())
def test_slicing_invariance(name: str, data: st.DataObject) -> None:
    """For any first global row and any split points, randomizing the whole block equals the
    concatenation of randomizing its slices, each with the words of its own global rows (and,
    for variable-draw mechanisms, a draw function addressed by global row).  The input is left
    unchanged."""
    m = example(name)
    row0 = data.draw(st.integers(0, 2 ** 40), label="row0")
    n = data.draw(st.integers(1, SLICE_ROWS), label="n")
    cuts = sorted(data.draw(st.sets(st.integers(1, max(1, n - 1)), max_size=6), label="cuts") - {n})
    x = SLICE_INPUTS[name][:n].copy()
    before = x.copy()
    label = f"slices/{name}"
    whole = release(m, x, label, row0)
    assert np.array_equal(x, before)
    bounds = [0, *cuts, n]
    parts = [release(m, x[a:b], label, row0 + a) for a, b in zip(bounds[:-1], bounds[1:])]
    assert len(whole) == len(m.output_fields("col"))
    for f, w in enumerate(as_lists(whole)):
        joined = [v for p in parts for v in as_lists(p)[f]]
        assert w == joined, f"output field {f} depends on how rows are sliced (row0 {row0}, cuts {cuts})"


# -- 7. pickling ----------------------------------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_pickle_round_trip(name: str) -> None:
    """A pickled mechanism (fresh, and after use, with its cached tables) has the same spec and
    gives the same outputs on the same words."""
    m = example(name)
    fresh = pickle.loads(pickle.dumps(m))
    x = skewed_input(m, 500, seed=7)
    ref = as_lists(release(m, x, f"pickle/{name}"))
    used = pickle.loads(pickle.dumps(m))
    for copy in (fresh, used):
        assert type(copy) is type(m) and copy.to_spec() == m.to_spec()
        assert as_lists(release(copy, x, f"pickle/{name}")) == ref


# -- 8. merge = concatenation ---------------------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_decoder_merge_equals_concatenation(name: str) -> None:
    """Decoders of two halves merged give the decoder of the whole: the same row count and the
    same results within 1e-12 relative (estimates and SEs, decoded masses and their covariance;
    for frequency oracles also the covariance of the joint decoder)."""
    m = example(name)
    x = skewed_input(m, 4000, seed=8)
    arrays = release(m, x, f"merge/{name}")
    cut = 1377
    whole = decode(m, arrays)
    left = decode(m, [a.slice(0, cut) for a in arrays])
    right = decode(m, [a.slice(cut) for a in arrays])
    left.merge(right)
    assert left.n == whole.n == len(x)
    a, b = decoded(m, left), decoded(m, whole)
    assert set(a) == set(b)
    for key in a:
        np.testing.assert_allclose(a[key], b[key], rtol=1e-12, atol=1e-15, err_msg=key)
    if m.family == "frequency":          # the joint decoder (co-support counts) merges the same way
        halves: list[Any] = [m.decoder(joint=True).add([a.slice(offset, length) for a in arrays])
                             for offset, length in ((0, cut), (cut, None))]
        full: Any = m.decoder(joint=True).add(arrays)
        np.testing.assert_allclose(halves[0].merge(halves[1]).covariance(), full.covariance(),
                                   rtol=1e-12, atol=1e-15)


# -- 9. the fit test's false-alarm rate -----------------------------------------------------------

FIT_RELEASES = 100
FIT_ROWS = 2000
FIT_ALPHA = 0.05
# at most this many of FIT_RELEASES honest releases may fail at FIT_ALPHA: the binomial
# (FIT_RELEASES, FIT_ALPHA) upper 0.999 quantile (a correct test exceeds it with probability < 0.001)
FIT_MAX_FAILS = int(stats.binom.ppf(0.999, FIT_RELEASES, FIT_ALPHA))


@pytest.mark.slow
@pytest.mark.parametrize("name", NAMES)
def test_fit_false_alarm_rate(name: str) -> None:
    """100 honest releases of 2000 rows (each its own data, drawn with a fixed seed, and its own
    rows of the keyed stream) at the declared eps: the column verdict's p-value (Bonferroni
    within the column, as ``validate`` reads it) is below 0.05 in at most FIT_MAX_FAILS (= 13,
    the binomial upper 0.999 quantile, a 13% share) of them.  About 8 s for all mechanisms."""
    m = example(name)
    if m.fit_test() is None:
        assert m.no_fit_reason(), "a mechanism without a fit test must say why"
        pytest.skip(m.no_fit_reason())
    assert m.no_fit_reason() == ""
    pvalues = []
    for r in range(FIT_RELEASES):
        x = skewed_input(m, FIT_ROWS, seed=1000 + r)
        fit = m.fit_test()
        assert fit is not None
        fit.add(release(m, x, f"fit/{name}", row0=r * FIT_ROWS))
        assert fit.rows == FIT_ROWS and fit.impossible == 0
        res = fit.result(FIT_ALPHA)
        pvalues.append(res.p_value)
    fails = sum(p < FIT_ALPHA for p in pvalues)
    assert fails <= FIT_MAX_FAILS, (fails, sorted(pvalues)[:12])


# -- 10. output fields, meanings, family ----------------------------------------------------------

@pytest.mark.parametrize("name", NAMES)
def test_output_fields_and_meanings(name: str) -> None:
    """Every output field is the column's name or column + "__suffix" (distinct names), has the
    arrow type of what randomize writes, and a non-empty meaning (distinct across the fields of
    one mechanism); one output array per field, one entry per row; the family is one of the three."""
    m = example(name)
    assert m.family in FAMILIES
    fields = m.output_fields("pay")
    assert fields and len({f.name for f in fields}) == len(fields)
    for f in fields:
        assert f.name == "pay" or (f.name.startswith("pay__") and len(f.name) > len("pay__")), f.name
    meanings = [m.output_meaning(f.name) for f in fields]
    assert all(isinstance(t, str) and t.strip() for t in meanings), meanings
    assert len(set(meanings)) == len(meanings), meanings
    x = skewed_input(m, 50, seed=9)
    arrays = release(m, x, f"fields/{name}")
    assert len(arrays) == len(fields)
    for f, a in zip(fields, arrays):
        assert len(a) == 50 and a.type == f.type, (f, a.type)
