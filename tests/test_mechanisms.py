"""Statistical and structural tests of every registered local randomizer.

Everything random here is driven by the keyed PRF (``random.KeyedStream``) under a FIXED
test key and nonce, so every Monte Carlo check is deterministic: it passes or fails the
same way on every run.  numpy's generator is used only to make synthetic input data
(fixed seeds).  Tolerances are stated next to each check; every Monte Carlo check also
asserts that its tolerance is several standard errors wide (computed exactly from the
mechanism's channel), so a pass means "agrees with the exact formula", not "too noisy to
tell".
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from conftest import keyed_words, realized_channel
from scipy import stats

from ldptransform.errors import PolicyError
from ldptransform.keys import SecretKey
from ldptransform.random import KeyedStream
from ldptransform.mechanisms import (
    CATEGORICAL,
    DISTRIBUTION,
    QUANTILE,
    GRR,
    NUMERIC,
    OLH,
    OUE,
    HadamardResponse,
    Hybrid,
    Piecewise,
    SquareWave,
    SubsetSelection,
    TwoPoint,
    build,
    choose_categorical,
    choose_numeric,
    registry,
)
from ldptransform.mechanisms import categorical as categorical_module

KEY = SecretKey(bytes(range(32)))
NONCE = "00112233445566778899aabbccddeeff"
LDP_SLACK = 1.0 + 1e-9  # relative float slack allowed on top of e^eps in ratio checks

# (mechanism, eps, k): unary encodings keep k <= 8 so their 2^k channels can be enumerated.
CAT_CASES = [
    ("grr", 1.0, 5), ("grr", 2.0, 3), ("grr", 0.5, 8),
    ("sue", 1.0, 4), ("sue", 2.0, 8),
    ("oue", 1.0, 6), ("oue", 3.0, 3),
    ("olh", 1.0, 6), ("olh", 2.5, 10),
]
# (mechanism, eps, bounds, grid or None for the mechanism's default)
NUM_CASES = [
    ("two-point", 0.5, (0.0, 1.0), None), ("two-point", 2.0, (-5.0, 20.0), None),
    ("piecewise", 1.0, (0.0, 100.0), 256), ("piecewise", 3.0, (-1.0, 1.0), 64),
    ("hybrid", 0.5, (0.0, 1.0), 256), ("hybrid", 1.5, (0.0, 70.0), 256),
    ("hybrid", 4.0, (24000.0, 140000.0), 128),
]


def _cid(case) -> str:
    return "-".join(str(c).replace(" ", "") for c in case)


def make_cat(name: str, eps: float, k: int):
    return build({"mechanism": name, "epsilon": eps, "categories": [f"c{i}" for i in range(k)]})


def make_num(name: str, eps: float, bounds, grid):
    spec = {"mechanism": name, "epsilon": eps, "bounds": list(bounds)}
    if grid is not None:
        spec["grid"] = grid
    return build(spec)


def prf_words(label: str, start: int, n: int, per_row: int) -> np.ndarray:
    return keyed_words(label, n, per_row, start, key=KEY, nonce=NONCE, stream="test")


def cat_data(k: int, n: int, seed: int) -> np.ndarray:
    """Synthetic codes with geometric frequencies (the rarest value still appears)."""
    w = 0.6 ** np.arange(k)
    return np.random.default_rng(seed).choice(k, size=n, p=w / w.sum()).astype(np.int64)


def num_data(bounds, n: int, seed: int) -> np.ndarray:
    """Synthetic skewed values inside bounds, with some rows exactly at each bound."""
    lo, hi = bounds
    rng = np.random.default_rng(seed)
    x = lo + (hi - lo) * rng.beta(2.0, 5.0, size=n)
    x[: n // 50] = lo
    x[n // 50: n // 25] = hi
    return rng.permutation(x)


def decoded(arrays: list[pa.Array]) -> list[list]:
    out = []
    for a in arrays:
        if pa.types.is_dictionary(a.type):
            a = a.dictionary_decode()
        out.append(a.to_pylist())
    return out


def all_mechanisms():
    return ([pytest.param(make_cat(*c), id=_cid(c)) for c in CAT_CASES]
            + [pytest.param(make_num(*c), id=_cid(c)) for c in NUM_CASES])


# --------------------------------------------------------------------------------------
# registry and specs
# --------------------------------------------------------------------------------------

def test_every_registered_mechanism_is_documented():
    """The registry is the one list of mechanisms: each one is on the mechanisms page docs/mechanisms.md
    (as `name`) and in the family table of docs/architecture.md, and in exactly one family listing."""
    names = set(registry())
    root = Path(__file__).resolve().parent.parent
    readme = (root / "docs" / "mechanisms.md").read_text(encoding="utf-8")
    table = (root / "docs" / "architecture.md").read_text(encoding="utf-8").split("## The mechanism contract")[1]
    assert not [n for n in names if f"`{n}`" not in readme], "mechanisms missing from docs/mechanisms.md"
    assert not [n for n in names if n not in table], "mechanisms missing from docs/architecture.md"
    assert len(names) >= 13
    assert set(CATEGORICAL) | set(NUMERIC) | set(DISTRIBUTION) | set(QUANTILE) == names
    assert len(CATEGORICAL) + len(NUMERIC) + len(DISTRIBUTION) + len(QUANTILE) == len(names)
    assert {registry()[n].kind for n in CATEGORICAL} == {"categorical"}
    assert {registry()[n].kind for n in NUMERIC} == {"numeric"}
    tested = {c[0] for c in CAT_CASES} | {c[0] for c in NUM_CASES}
    # the distribution mechanisms (DISTRIBUTION) are exercised by tests/test_distribution.py, the
    # newer oracles and discrete-laplace by their own files (test_hadamard_subset.py, test_matrix.py,
    # test_discrete_laplace.py)
    own_files = {"hadamard", "subset", "matrix", "discrete-laplace"}
    # sequential-quantile: tests/test_sequential_quantile.py
    assert tested == names - set(DISTRIBUTION) - set(QUANTILE) - own_files, "every registered mechanism is exercised"


FAMILY_OF_KIND = {"categorical": "frequency", "numeric": "mean", "distribution": "distribution", "quantile": "quantile"}


def test_every_mechanism_fills_the_contract():
    """Family, kind and listing agree; each class names its policy fields in a strict pydantic
    model and refuses the others; the family bases are the ones the decoder reads."""
    from pydantic import BaseModel

    from ldptransform.mechanisms import (
        FAMILIES,
        LISTED,
        DistributionMechanism,
        FrequencyOracle,
        MeanMechanism,
        Mechanism,
        names_of,
    )

    base_of = {"frequency": FrequencyOracle, "mean": MeanMechanism, "distribution": DistributionMechanism,
               "quantile": Mechanism}
    assert set(LISTED) == set(registry()) and len(LISTED) == len(set(LISTED))
    assert names_of("frequency") == CATEGORICAL and names_of("mean") == NUMERIC
    assert names_of("distribution") == DISTRIBUTION
    for name, cls in registry().items():
        assert cls.family in FAMILIES and FAMILY_OF_KIND[cls.kind] == cls.family, name
        assert issubclass(cls, base_of[cls.family]), name
        assert issubclass(cls.Params, BaseModel) and cls.Params.model_config.get("extra") == "forbid", name
        assert set(cls.policy_fields()) <= {"hash_range", "subset_size", "matrix", "grid", "branching", "leaves",
                                            "quantile"}, name
    assert registry()["olh"].policy_fields() == ("hash_range",)
    assert registry()["two-point"].policy_fields() == ()
    assert "grid" in registry()["two-point"].field_refusals


@pytest.mark.parametrize("name", sorted(set(CATEGORICAL) - {"matrix"}) + sorted(set(NUMERIC) | set(DISTRIBUTION)))
def test_from_policy_with_defaults_equals_the_spec_built_mechanism(name):
    cls = registry()[name]
    domain = ["a", "b", "c", "d"] if cls.family == "frequency" else (0.0, 10.0)
    m = cls.from_policy(1.0, domain, {f: None for f in cls.policy_fields()})
    key = "categories" if cls.family == "frequency" else "bounds"
    assert m.to_spec() == build({"mechanism": name, "epsilon": 1.0, key: list(domain)}).to_spec()


def test_from_policy_names_the_missing_or_refused_field():
    from ldptransform.mechanisms import MechanismParamError

    with pytest.raises(MechanismParamError, match="needs the transition matrix") as err:
        registry()["matrix"].from_policy(1.0, ["a", "b"], {})
    assert err.value.field == "matrix"
    with pytest.raises(MechanismParamError, match="two-point has no input grid") as err:
        registry()["two-point"].from_policy(1.0, (0, 1), {"grid": 8})
    assert err.value.field == "grid"
    sub = registry()["subset"].from_policy(1.0, ["a", "b", "c", "d"], {"subset_size": 2})
    assert isinstance(sub, SubsetSelection) and sub.m == 2


def test_planner_and_memoize_hooks():
    from ldptransform.mechanisms import DiscreteLaplace, Matrix
    from ldptransform.mechanisms.matrix import grr_matrix

    mat = Matrix(2.0, ["a", "b", "c"], grr_matrix(1.0, 3).tolist())
    assert mat.fixed_epsilon() == pytest.approx(1.0, abs=1e-9) and not mat.accepts_binned
    assert GRR(1.0, ["a", "b"]).fixed_epsilon() is None
    dl = DiscreteLaplace(1.0, (0, 10), 16)
    assert not dl.supports_memoize and "variable number" in dl.memoize_refusal and dl.exact_decimal_epsilon
    assert Hybrid(1.0, (0, 10)).supports_memoize and Hybrid(1.0, (0, 10)).memoize_refusal == ""
    assert registry()["square-wave"] is SquareWave
    sw = SquareWave(1.0, (0, 10), 16)
    assert sw.mean_row_variance() is None and sw.frequency_row_variance() is None and sw.fit_test() is not None
    assert GRR(1.0, ["a", "b"]).mean_row_variance() is None
    assert dl.mean_row_variance() == pytest.approx(max(dl.variance(0.0), dl.variance(10.0)) + 25.0)
    tp = TwoPoint(1.0, (0, 10))
    assert tp.mean_row_variance() == pytest.approx(float(np.max(tp.second_moments())) * 25.0)


def test_no_module_outside_mechanisms_names_or_probes_a_mechanism():
    """Decisions about a mechanism are asked of its class: no mechanism name as a string literal,
    no isinstance against a mechanism class, no hasattr/getattr on a mechanism outside mechanisms/."""
    import re
    from pathlib import Path

    import ldptransform

    names = "|".join(re.escape(n) for n in registry())
    literal = re.compile(rf"""["']({names})["']""")
    probe = re.compile(r"isinstance\([^)]*(mech\.|FrequencyOracle|GridMechanism|MeanMechanism|Distribution"
                       r"Mechanism|SquareWave|Hierarchy|Matrix|GRR|OLH|DiscreteLaplace)"
                       r"|(hasattr|getattr)\((m|mechanism|\w+\.mechanism)\b")
    root = Path(ldptransform.__file__).parent
    found = []
    for path in sorted(root.rglob("*.py")):
        if "mechanisms" in path.relative_to(root).parts:
            continue
        for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            code = line.split("#", 1)[0]
            # a policy field that shares its name with its mechanism ("matrix") may be named as a field
            names_hit = [mt for mt in literal.finditer(code)
                         if not code[: mt.start()].endswith(("_field_doc(", "field_owners("))]
            if names_hit or probe.search(code):
                found.append(f"{path.relative_to(root)}:{i}: {line.strip()}")
    assert not found, "\n".join(found)


@pytest.mark.parametrize("m", all_mechanisms())
def test_spec_round_trip_and_family_check(m):
    spec = m.to_spec()
    again = build(json.loads(json.dumps(spec)))  # the manifest stores the spec as JSON
    assert type(again) is type(m)
    assert again.to_spec() == spec
    assert again.epsilon == m.epsilon and again.words_per_row == m.words_per_row
    for other in registry():
        if other != m.name:
            with pytest.raises(PolicyError):
                type(m).from_spec({**spec, "mechanism": other})
    with pytest.raises(PolicyError):
        build({**spec, "mechanism": "no-such-mechanism"})


def test_olh_spec_keeps_an_explicit_hash_range():
    m = OLH(1.0, ["a", "b", "c"], hash_range=7)
    olh = build(m.to_spec())
    assert isinstance(olh, OLH) and olh.g == 7
    with pytest.raises(PolicyError):
        OLH(1.0, ["a", "b"], hash_range=1)


# --------------------------------------------------------------------------------------
# exact channels: eps bound, normalization, unbiasedness
# --------------------------------------------------------------------------------------

def _assert_channel_is_eps_ldp(Q: np.ndarray, eps: float) -> float:
    """Q[input, output]; rows sum to 1; per output max/min over inputs <= e^eps."""
    np.testing.assert_allclose(Q.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert (Q >= 0).all()
    used = Q.max(axis=0) > 0
    assert (Q[:, used].min(axis=0) > 0).all(), "an output possible for one input is impossible for another"
    ratio = float(np.max(Q[:, used].max(axis=0) / Q[:, used].min(axis=0)))
    assert ratio <= math.exp(eps) * LDP_SLACK
    return ratio


@pytest.mark.parametrize("case", [c for c in CAT_CASES if c[0] != "olh"], ids=_cid)
def test_categorical_channel_meets_eps_and_is_tight(case):
    m = make_cat(*case)
    Q = m.channel()
    assert Q.shape == (m.k, m.k if m.name == "grr" else 2 ** m.k)
    ratio = _assert_channel_is_eps_ldp(Q, m.epsilon)
    assert m.max_log_ratio() <= m.epsilon + 1e-9
    # the analytic max_log_ratio is the channel's actual worst ratio, and the whole budget is used
    assert math.log(ratio) == pytest.approx(m.max_log_ratio(), abs=1e-9)
    assert m.max_log_ratio() == pytest.approx(m.epsilon, abs=1e-9)


@pytest.mark.parametrize("case", [c for c in CAT_CASES if c[0] != "olh"], ids=_cid)
def test_categorical_channel_times_estimator_is_identity(case):
    """Exact unbiasedness: sum_y P(y|x) est_v(y) = 1[x = v], over the whole output alphabet
    (GRR: the k labels; unary encodings: all 2^k bit strings)."""
    m = make_cat(*case)
    if m.name == "grr":
        outputs = [pa.array(m.categories)]
    else:
        strings = ["".join("1" if (j >> i) & 1 else "0" for i in range(m.k)) for j in range(2 ** m.k)]
        outputs = [pa.array(strings)]  # column order of channel(): bit i of j = character i
    est = m.row_estimates(outputs)
    np.testing.assert_allclose(m.channel() @ est, np.eye(m.k), rtol=0, atol=1e-9)


@pytest.mark.parametrize("case", [c for c in CAT_CASES if c[0] == "olh"], ids=_cid)
def test_olh_channel_given_seeds_meets_eps(case):
    m = make_cat(*case)
    x = np.arange(400, dtype=np.int64) % m.k
    seeds = np.asarray(m.randomize(x, prf_words(f"olh-seeds/{_cid(case)}", 0, 400, m.words_per_row))[0]
                       .to_numpy()).astype(np.uint64)
    Q = m.channel_given_seeds(seeds)  # (seed, x, y)
    assert Q.shape == (400, m.k, m.g)
    E = math.exp(m.epsilon)
    np.testing.assert_allclose(Q.sum(axis=2), 1.0, rtol=0, atol=1e-12)
    ratios = Q.max(axis=1) / Q.min(axis=1)  # per (seed, y), over inputs x
    assert ratios.max() <= E * LDP_SLACK
    assert math.log(ratios.max()) == pytest.approx(m.max_log_ratio(), abs=1e-9)
    assert m.max_log_ratio() <= m.epsilon + 1e-9
    # the report y = H(x) has probability p* given the seed
    h = m.hash_values(seeds[:, None], np.arange(m.k, dtype=np.uint64)[None, :])
    np.testing.assert_allclose(np.take_along_axis(Q, h[:, :, None], axis=2)[..., 0], m.p_star, rtol=1e-15)


def test_olh_exactly_unbiased_over_all_hash_seeds(monkeypatch):
    """OLH's q* uses the exact collision probability of the hash family, so averaging over
    every seed gives sum_seed P(seed) sum_y P(y|x,seed) est_v(seed, y) = 1[x = v] exactly.
    The full seed set has (P-1) * P members; enumerate it with the same code and a small
    prime in place of 2^31 - 1 (the hash, the bucket sizes and the decoder all read it)."""
    monkeypatch.setattr(categorical_module, "HASH_PRIME", 61)
    m = OLH(1.0, [f"c{i}" for i in range(7)], hash_range=4)
    P = 61
    a, b = np.meshgrid(np.arange(1, P, dtype=np.uint64), np.arange(P, dtype=np.uint64), indexing="ij")
    seeds = (a * np.uint64(P) + b).ravel()
    Q = m.channel_given_seeds(seeds)  # (s, k, g)
    s_col = np.repeat(seeds.astype(np.int64), m.g)
    y_col = np.tile(np.arange(m.g, dtype=np.int32), len(seeds))
    est = m.row_estimates([pa.array(s_col), pa.array(y_col)]).reshape(len(seeds), m.g, m.k)
    expected = np.einsum("sxy,syv->xv", Q, est) / len(seeds)
    np.testing.assert_allclose(expected, np.eye(m.k), rtol=0, atol=1e-12)
    # and the naive q* = 1/g would be visibly biased at this prime: the check has teeth
    p = m.p_star
    naive = np.einsum("sxy,syv->xv", Q, est * (p - m.q_star) + m.q_star - 1 / m.g) / len(seeds) / (p - 1 / m.g)
    assert np.abs(naive - np.eye(m.k)).max() > 1e-4


@pytest.mark.parametrize("case", NUM_CASES, ids=_cid)
def test_numeric_channel_meets_eps_and_is_unbiased(case):
    m = make_num(*case)
    Q = m.channel()
    assert Q.shape == (m.grid + 1, m.outputs.shape[0])
    _assert_channel_is_eps_ldp(Q, m.epsilon)
    assert m.max_log_ratio() <= m.epsilon + 1e-9
    assert m.max_log_ratio() == pytest.approx(m.epsilon, abs=1e-6)  # the budget is used
    # exact unbiasedness on the grid (normalized units).  The channel's masses are whole
    # multiples of 2^-50, so the mean can sit ~M * 2^-50 * C (~1e-12) off the grid point.
    np.testing.assert_allclose(Q @ m.outputs, m.inputs, rtol=0, atol=1e-10)
    # ... and in column units, through the written output values
    np.testing.assert_allclose(Q @ m.output_values, m.to_units(m.inputs), rtol=0,
                               atol=1e-10 * (m.hi - m.lo))


def _realized_grid_channel(m) -> np.ndarray:
    """P(output j | grid input i) as the sampler realizes it (bounds (-1, 1) and a power-of-two
    grid make the grid points exact)."""
    assert (m.lo, m.hi) == (-1.0, 1.0)
    return realized_channel(m.randomize_index, m.to_units(m.inputs), m.outputs.shape[0])


@pytest.mark.parametrize("cls,eps,grid", [
    (Piecewise, 1.0, 64), (Hybrid, 2.0, 64), (Piecewise, 5.0, 256), (TwoPoint, 1.0, 1),
    # eps values where a window end of one grid input falls ~1e-11 from another's, which
    # creates cells of probability ~1e-13: these must still be realized with ratio <= e^eps
    (Piecewise, 1.3862943611, 256), (Hybrid, 8.317766167069, 256),
], ids=lambda v: getattr(v, "name", str(v)))
def test_sampler_realizes_the_exact_channel(cls, eps, grid):
    m = cls(eps, (-1.0, 1.0), grid)
    P = _realized_grid_channel(m)
    assert np.array_equal(P, m.channel()), np.abs(P - m.channel()).max()
    _assert_channel_is_eps_ldp(P, eps)


# --------------------------------------------------------------------------------------
# Monte Carlo with a fixed key: unbiasedness and exact variances
# --------------------------------------------------------------------------------------

def _bernoulli_r2_moments(b: float, p: float, q: float) -> tuple[float, float]:
    """For r = (B - b)/(p - q) with B ~ Bernoulli(b): (E r^2, Var r^2)."""
    m2 = b * (1 - b) / (p - q) ** 2
    m4 = b * (1 - b) * ((1 - b) ** 3 + b ** 3) / (p - q) ** 4
    return m2, m4 - m2 ** 2


def check_categorical_mc(m, n: int, label: str, seed: int) -> None:
    x = cat_data(m.k, n, seed)
    f = np.bincount(x, minlength=m.k) / n
    arrays = m.randomize(x, prf_words(label, 0, n, m.words_per_row))
    assert m.count_invalid(arrays) == 0
    est = m.row_estimates(arrays)  # (n, k)
    assert est.shape == (n, m.k)
    exact = m.variance(f)  # n * Var of each frequency estimate
    # (a) mean of per-row estimates = true frequency, within 5 standard errors
    se = np.sqrt(exact / n)
    assert np.all(np.abs(est.mean(axis=0) - f) <= 5 * se), (est.mean(axis=0) - f) / se
    # (b) per-row residual (estimate minus the indicator 1[x = v]) has the exact variance
    resid = est - (x[:, None] == np.arange(m.k)[None, :])
    emp = (resid ** 2).mean(axis=0)
    p, q = m.p_star, m.q_star
    for v in range(m.k):
        m2_in, v2_in = _bernoulli_r2_moments(p, p, q)
        m2_out, v2_out = _bernoulli_r2_moments(q, p, q)
        assert f[v] * m2_in + (1 - f[v]) * m2_out == pytest.approx(exact[v], rel=1e-12)
        se_v = math.sqrt(f[v] * v2_in + (1 - f[v]) * v2_out) / math.sqrt(n)  # SE of emp[v]
        assert 0.10 * exact[v] >= 4 * se_v, "sample too small for a 10% check to mean anything"
        assert abs(emp[v] - exact[v]) <= 0.10 * exact[v], (v, emp[v], exact[v])


@pytest.mark.parametrize("case", CAT_CASES, ids=_cid)
def test_categorical_monte_carlo(case):
    check_categorical_mc(make_cat(*case), 20_000, f"mc/{_cid(case)}", seed=11)


@pytest.mark.slow
@pytest.mark.parametrize("case", [("grr", 4.0, 4), ("oue", 4.0, 5), ("olh", 2.0, 48), ("sue", 0.5, 12)], ids=_cid)
def test_categorical_monte_carlo_large(case):
    check_categorical_mc(make_cat(*case), 200_000, f"mc-large/{_cid(case)}", seed=12)


def _row_moments(m, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Exact E[(out - x)^2] and Var[(out - x)^2] of each row (column units), random rounding
    included, from the channel's raw moments."""
    N = m.grid
    t = m.normalize(x)
    s = (t + 1.0) * (N / 2.0)
    i0 = np.minimum(np.floor(s), N - 1).astype(np.int64)
    lam = s - i0
    Q, o = m.channel(), m.outputs
    raw = np.stack([Q @ o ** j for j in range(5)], axis=1)  # (N+1, 5): E[o^j | grid point]
    mom = (1 - lam)[:, None] * raw[i0] + lam[:, None] * raw[i0 + 1]
    c2 = mom[:, 2] - 2 * t * mom[:, 1] + t ** 2 * mom[:, 0]
    c4 = (mom[:, 4] - 4 * t * mom[:, 3] + 6 * t ** 2 * mom[:, 2] - 4 * t ** 3 * mom[:, 1]
          + t ** 4 * mom[:, 0])
    scale = (m.hi - m.lo) / 2.0
    return c2 * scale ** 2, (c4 - c2 ** 2) * scale ** 4


def check_numeric_mc(m, n: int, label: str, seed: int) -> None:
    x = num_data((m.lo, m.hi), n, seed)
    arrays = m.randomize(x, prf_words(label, 0, n, m.words_per_row))
    assert m.count_invalid(arrays) == 0
    out = arrays[0].to_numpy()
    var = m.variance(x)
    c2, var_r2 = _row_moments(m, x)
    np.testing.assert_allclose(c2, var, rtol=1e-9, atol=1e-12 * (m.hi - m.lo) ** 2)
    # (a) mean of the written values = true mean, within 5 standard errors
    se = math.sqrt(var.mean() / n)
    assert abs(out.mean() - x.mean()) <= 5 * se, (out.mean() - x.mean()) / se
    # (b) per-row residual out - x has the exact variance (averaged over rows)
    emp = np.mean((out - x) ** 2)
    se_r2 = math.sqrt(var_r2.sum()) / n
    assert 0.10 * var.mean() >= 4 * se_r2, "sample too small for a 10% check to mean anything"
    assert abs(emp - var.mean()) <= 0.10 * var.mean(), (emp, var.mean())


@pytest.mark.parametrize("case", NUM_CASES, ids=_cid)
def test_numeric_monte_carlo(case):
    check_numeric_mc(make_num(*case), 20_000, f"mc/{_cid(case)}", seed=21)


@pytest.mark.slow
@pytest.mark.parametrize("case", [("piecewise", 6.0, (0.0, 1.0), 256), ("hybrid", 0.8, (-3.0, 3.0), 512),
                                  ("two-point", 5.0, (0.0, 10.0), None)], ids=_cid)
def test_numeric_monte_carlo_large(case):
    check_numeric_mc(make_num(*case), 200_000, f"mc-large/{_cid(case)}", seed=22)


def test_numeric_outputs_are_spread_like_the_channel():
    """A mean-and-variance check could pass with a wrong output distribution that has the
    right two moments; compare the full output histogram for one input grid point with
    the channel row (max abs difference of the empirical CDF, DKW bound at 1e-6)."""
    m = Piecewise(2.0, (-1.0, 1.0), 32)
    n = 50_000
    i = 20
    x = np.full(n, m.inputs[i])
    idx = m.randomize_index(x, prf_words("cdf/piecewise", 0, n, m.words_per_row))
    emp_cdf = np.cumsum(np.bincount(idx, minlength=m.outputs.shape[0])) / n
    dkw = math.sqrt(math.log(2 / 1e-6) / (2 * n))  # P(sup |F_n - F| > dkw) <= 1e-6
    assert np.abs(emp_cdf - np.cumsum(m.channel()[i])).max() <= dkw
    # a neighbouring input's row is far outside that band (the check can fail)
    assert np.abs(emp_cdf - np.cumsum(m.channel()[i + 2])).max() > 3 * dkw


@pytest.mark.parametrize("cls,eps,grid", [(TwoPoint, 1.0, 1), (Piecewise, 2.0, 8), (Hybrid, 3.0, 8)],
                         ids=lambda v: getattr(v, "name", str(v)))
def test_numeric_random_rounding_between_grid_points(cls, eps, grid):
    """An input between grid points t_i < t < t_{i+1} must be sent through the mixture
    (1 - lam) Q[i] + lam Q[i+1], lam = (t - t_i)/(t_{i+1} - t_i).  On a coarse grid a
    rounding error (say, always rounding down) would shift the mean by up to a grid step,
    dozens of standard errors here.  Checks: mean within 5 SE of x, and the empirical CDF
    of the output index within the DKW band (failure probability 1e-6) of the mixture's."""
    m = cls(eps, (10.0, 30.0), grid)
    n = 20_000
    step = 2.0 / m.grid
    Q = m.channel()
    dkw = math.sqrt(math.log(2 / 1e-6) / (2 * n))
    for j, (i, lam) in enumerate([(0, 0.25), (m.grid // 2, 0.5), (m.grid - 1, 0.9)]):
        t = m.inputs[i] + lam * step
        x = np.full(n, float(m.to_units(t)))
        lam = (m.normalize(x[0]) - m.inputs[i]) / step  # the exact fraction after unit conversion
        idx = m.randomize_index(x, prf_words(f"rounding/{m.name}/{j}", 0, n, m.words_per_row))
        out = m.output_values[idx]
        se = math.sqrt(float(m.variance(x[0])) / n)
        assert abs(out.mean() - x[0]) <= 5 * se, (out.mean() - x[0]) / se
        mix = (1 - lam) * Q[i] + lam * Q[i + 1]
        emp_cdf = np.cumsum(np.bincount(idx, minlength=Q.shape[1])) / n
        assert np.abs(emp_cdf - np.cumsum(mix)).max() <= dkw


def _category_cells(m, x: int, arrays) -> tuple[np.ndarray, np.ndarray]:
    """Observed cell of each report and the channel's probability of each cell, for input x.
    GRR: the reported label.  Unary encodings: (bit x, number of other 1-bits), which
    summarizes the 2^k outputs without cells of tiny expectation.  OLH: the offset of the
    reported bucket from H(x), (y - H(x)) mod g, whose law given x does not depend on the seed."""
    if m.name == "grr":
        return m.reported_codes(arrays).astype(np.int64), m.channel()[x]
    if m.name in ("sue", "oue"):
        bits = m.support(arrays)
        cell = bits[:, x] * m.k + bits.sum(axis=1) - bits[:, x]
        j = np.arange(2 ** m.k)
        obits = (j[:, None] >> np.arange(m.k)[None, :]) & 1
        ocell = obits[:, x] * m.k + obits.sum(axis=1) - obits[:, x]
        return cell, np.bincount(ocell, weights=m.channel()[x], minlength=2 * m.k)
    seeds = np.asarray(arrays[0].to_numpy()).astype(np.uint64)
    y = np.asarray(arrays[1].to_numpy()).astype(np.int64)
    h = m.hash_values(seeds, np.full(len(seeds), x, dtype=np.uint64))
    row = m.channel_given_seeds(seeds[:1])[0, x]
    return (y - h) % m.g, np.roll(row, -int(h[0]))


def _pooled_chisquare(cells: list[np.ndarray], probs: list[np.ndarray]) -> float:
    """p-value of the sum of per-input Pearson statistics (cells with expectation < 5 pooled)."""
    total, dof = 0.0, 0
    for c, p in zip(cells, probs):
        n = len(c)
        obs = np.bincount(c, minlength=len(p)).astype(float)
        exp_ = n * p
        small = exp_ < 5
        if small.any():
            obs = np.append(obs[~small], obs[small].sum())
            exp_ = np.append(exp_[~small], exp_[small].sum())
        keep = exp_ > 0
        assert obs[~keep].sum() == 0, "an output the channel says is impossible"
        total += float(((obs[keep] - exp_[keep]) ** 2 / exp_[keep]).sum())
        dof += int(keep.sum()) - 1
    return float(stats.chi2.sf(total, dof))


@pytest.mark.parametrize("case", CAT_CASES, ids=_cid)
def test_categorical_output_distribution_matches_channel(case):
    """Goodness of fit of the sampled reports to the exact channel, 20000 reports per input
    value, Pearson chi-square pooled over inputs.  Threshold: p >= 1e-4 (fixed key, so the
    outcome is deterministic).  The same reports tested against the channel of
    eps + 0.25 must give p < 1e-4.  (Checked by hand: a GRR keeping the true value with
    probability 0.97 p instead of p fails this test; the mean/variance checks miss it.)"""
    m = make_cat(*case)
    wrong = build({**m.to_spec(), "epsilon": m.epsilon + 0.25})  # same categories (and OLH g)
    n = 20_000
    cells, probs, probs_wrong = [], [], []
    for x in range(m.k):
        arrays = m.randomize(np.full(n, x, dtype=np.int64),
                             prf_words(f"gof/{_cid(case)}", x * n, n, m.words_per_row))
        c, p = _category_cells(m, x, arrays)
        cells.append(c)
        probs.append(p)
        probs_wrong.append(_category_cells(wrong, x, arrays)[1])
    for p in probs:
        assert p.sum() == pytest.approx(1.0, abs=1e-12)
    assert _pooled_chisquare(cells, probs) >= 1e-4
    assert _pooled_chisquare(cells, probs_wrong) < 1e-4


# --------------------------------------------------------------------------------------
# purity of randomize, independence of batching
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("m", all_mechanisms())
def test_randomize_keeps_input_and_ignores_batch_split(m):
    n, a = 1000, 377
    x = cat_data(m.k, n, 5) if m.kind == "categorical" else num_data((m.lo, m.hi), n, 5)
    x_before = x.copy()
    label = f"split/{m.name}"
    whole_words = prf_words(label, 0, n, m.words_per_row)
    pieces = [prf_words(label, 0, a, m.words_per_row), prf_words(label, a, n - a, m.words_per_row)]
    assert np.array_equal(whole_words, np.concatenate(pieces))
    whole = m.randomize(x, whole_words)
    assert np.array_equal(x, x_before) and x.dtype == x_before.dtype
    parts = [m.randomize(x[:a], pieces[0]), m.randomize(x[a:], pieces[1])]
    assert np.array_equal(x, x_before)
    assert len(whole) == len(m.output_fields("col"))
    for col, (w, p0, p1) in enumerate(zip(decoded(whole), decoded(parts[0]), decoded(parts[1]))):
        assert w == p0 + p1, f"output column {col} depends on how rows are batched"
    # the words really drive the output (a different stream gives different outputs)
    other = m.randomize(x, prf_words(label + "/other", 0, n, m.words_per_row))
    assert decoded(other) != decoded(whole)


# --------------------------------------------------------------------------------------
# count_invalid
# --------------------------------------------------------------------------------------

def _genuine(m, n=200):
    x = cat_data(m.k, n, 7) if m.kind == "categorical" else num_data((m.lo, m.hi), n, 7)
    return m.randomize(x, prf_words(f"invalid/{m.name}", 0, n, m.words_per_row))


def test_count_invalid_grr():
    m = make_cat("grr", 1.0, 5)
    arrays = _genuine(m)
    assert m.count_invalid(arrays) == 0
    labels = decoded(arrays)[0]
    assert m.count_invalid([pa.array(labels)]) == 0  # plain strings are fine too
    bad = list(labels)
    bad[3], bad[10], bad[11] = "not-a-category", "C0", None
    assert m.count_invalid([pa.array(bad)]) == 3


@pytest.mark.parametrize("name", ["sue", "oue"])
def test_count_invalid_unary(name):
    m = make_cat(name, 1.0, 6)
    arrays = _genuine(m)
    assert m.count_invalid(arrays) == 0
    bits = decoded(arrays)[0]
    bad = list(bits)
    bad[0] = bits[0][:-1]          # too short
    bad[1] = bits[1] + "0"         # too long
    bad[2] = "01x010"              # foreign character
    bad[3] = None
    assert m.count_invalid([pa.array(bad)]) == 4


def test_count_invalid_olh():
    m = make_cat("olh", 1.0, 6)
    arrays = _genuine(m)
    assert m.count_invalid(arrays) == 0
    seeds, ys = decoded(arrays)
    seeds, ys = list(seeds), list(ys)
    ys[0] = m.g          # bucket out of range
    ys[1] = -1
    seeds[2] = 5         # a = 0: not a seed the randomizer can produce
    seeds[3] = categorical_module.HASH_PRIME ** 2  # a = P: out of range
    ys[4] = None
    assert m.count_invalid([pa.array(seeds, pa.int64()), pa.array(ys, pa.int32())]) == 5


@pytest.mark.parametrize("case", NUM_CASES, ids=_cid)
def test_count_invalid_numeric(case):
    m = make_num(*case)
    arrays = _genuine(m)
    assert m.count_invalid(arrays) == 0
    vals = arrays[0].to_numpy().copy()
    alpha = m.output_values
    vals[0] = (alpha[0] + alpha[1]) / 2        # between two outputs
    vals[1] = alpha[-1] + (m.hi - m.lo)          # beyond the alphabet
    vals[2] = np.nan
    vals[3] = alpha[0] - 1e-6 * (m.hi - m.lo)    # close to, but not, an output
    assert m.count_invalid([pa.array(vals)]) == 4
    assert m.count_invalid([pa.array(["1.0"] * 3)]) == 3  # not numbers at all


# --------------------------------------------------------------------------------------
# automatic choice of mechanism
# --------------------------------------------------------------------------------------

EPS_GRID = [0.1, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0]


def _direct_choice(cands, score):
    scores = [score(m) for m in cands]
    best = min(scores)
    # the documented tie rule: within 1e-9 relative of the best, the earlier candidate wins
    return next(m for m, s in zip(cands, scores) if s <= best * (1 + 1e-9))


def test_choose_categorical_matches_direct_computation():
    for eps in EPS_GRID:
        for k in [2, 3, 5, 8, 13, 21, 34, 60, 100, 250, 600]:
            cats = [str(i) for i in range(k)]
            chosen, why = choose_categorical(eps, cats)
            cands = [GRR(eps, cats), HadamardResponse(eps, cats), OLH(eps, cats), SubsetSelection(eps, cats),
                     OUE(eps, cats)]
            expected = _direct_choice(cands, lambda m: m.total_variance())
            assert chosen.name == expected.name, (eps, k, why)
            assert chosen.total_variance() == pytest.approx(min(m.total_variance() for m in cands), rel=1e-9)
            # total_variance really is n * sum_v Var(f_v) (for any f summing to 1)
            f = np.random.default_rng(k).dirichlet(np.ones(k))
            assert chosen.total_variance() == pytest.approx(float(chosen.variance(f).sum()), rel=1e-9)


def test_choose_categorical_follows_the_grr_oue_rule_away_from_the_boundary():
    """Wang et al. (USENIX Security 2017): GRR beats OUE iff k < 3e^eps + 2, for the
    'f small' variance.  The chooser ranks the exact total variance, whose f-terms move
    the switch down to k* = [(2E+3) + sqrt(8E^2 + 12E + 5)] / 2 <= 3E + 2 (derived here by
    equating the exact totals of GRR and OUE; k* ~ 2.41 E for large E), so the rule holds
    only away from the boundary: GRR for k <= 0.75 (3E+2), not GRR for k >= 1.05 (3E+2)."""
    for eps in EPS_GRID:
        E = math.exp(eps)
        rule = 3 * E + 2
        k_star = ((2 * E + 3) + math.sqrt(8 * E * E + 12 * E + 5)) / 2
        assert k_star <= rule + 1e-9
        for k in range(2, int(2 * rule) + 3):
            cats = [str(i) for i in range(k)]
            # the rule itself, on the approximate variances (exact algebra)
            if abs(k - rule) > 1e-6:
                assert (GRR(eps, cats).approx_variance() < OUE(eps, cats).approx_variance()) == (k < rule)
            # the exact-total switch between GRR and OUE
            if abs(k - k_star) > 1e-6:
                assert (GRR(eps, cats).total_variance() < OUE(eps, cats).total_variance()) == (k < k_star)
            # the chooser also weighs subset selection, which at m = 1 *is* GRR (same total
            # variance) and otherwise beats it: GRR is chosen exactly when the best m is 1,
            # and never where OUE alone already beats GRR
            chosen, _ = choose_categorical(eps, cats)
            m_best = SubsetSelection.best_subset_size(eps, k)
            assert SubsetSelection(eps, cats, 1).total_variance() == pytest.approx(GRR(eps, cats).total_variance(),
                                                                                   rel=1e-12)
            assert (chosen.name == "grr") == (m_best == 1), (eps, k, chosen.name, m_best)
            if k >= 1.05 * rule:
                assert chosen.name != "grr", (eps, k)


def test_choose_numeric_matches_direct_computation():
    for eps in EPS_GRID + [0.6, 0.62, 1.25, 1.33, 8.0]:
        for bounds, grid in [((0.0, 1.0), 256), ((-40.0, 60.0), 64)]:
            chosen, why = choose_numeric(eps, bounds, grid)
            cands = [TwoPoint(eps, bounds), Hybrid(eps, bounds, grid), Piecewise(eps, bounds, grid)]
            expected = _direct_choice(cands, lambda m: m.worst_variance())
            assert chosen.name == expected.name, (eps, why)
            # worst_variance is the max of the exact variance over the domain
            xs = np.linspace(bounds[0], bounds[1], 2001)
            for m in cands:
                assert m.worst_variance() >= m.variance(xs).max() * (1 - 1e-12)
                assert m.worst_variance() <= m.variance(xs).max() * (1 + 1e-3)
            # hybrid equals two-point while alpha = 0 (eps <= 0.61), and wins outright above
            assert chosen.name == ("two-point" if eps <= 0.61 else "hybrid"), (eps, why)


def test_guide_table_search_gives_the_binary_searchs_outputs():
    """draw_index with a guide table (one look-up, then steps) returns exactly what the binary
    search returns, for every table the mechanisms build and for a clumped one (many tiny
    masses in one slice, where the steps are many), over 200,000 keyed words each."""
    from ldptransform.mechanisms import Matrix, Piecewise, SquareWave
    from ldptransform.mechanisms.matrix import grr_matrix
    from ldptransform.random.variates import (
        SAMPLING_BITS,
        draw_index,
        guide_table,
        sampling_table,
    )

    stream = KeyedStream(SecretKey(bytes(range(32))), "0" * 32, "guide-test")
    w = stream.words(0, 200_000, 2)
    cases = []
    for eps in (0.1, 1.0, 8.0):
        m = Piecewise(eps, (0, 100))
        cases.append((m._sampling_table, m.outputs.shape[0]))
    sw = SquareWave(1.0, (0, 10))
    cases.append((sw._table, sw.n_cells))
    mx = Matrix(1.0, [f"c{i}" for i in range(40)], grr_matrix(1.0, 40).tolist())
    cases.append((mx._table, mx.k))
    S = 1 << SAMPLING_BITS
    F = np.full((3, 600), 1.0)  # 599 masses of one unit and one of the rest: all in the first slice
    F[:, -1] = S - 599
    cases.append((sampling_table(F), 600))
    for table, M in cases:
        guide = guide_table(table, M)
        assert guide is not None
        R = table.size // M
        i = (w[:, 0] % np.uint64(R)).astype(np.int64)
        words = w[:, 1].copy()
        words[:1000] = np.arange(1000, dtype=np.uint64) << np.uint64(64 - SAMPLING_BITS)  # u = 0..999
        np.testing.assert_array_equal(draw_index(table, i, words, M, guide), draw_index(table, i, words, M))


def test_sorted_position_equals_searchsorted():
    """The guided search used to check written values against a mechanism's output alphabet
    gives np.searchsorted's index for every value: on and between alphabet values, on slice
    edges, outside the range, NaN and infinities, for the alphabets of piecewise at several eps
    and for an uneven alphabet."""
    from ldptransform.mechanisms import Piecewise
    from ldptransform.mechanisms.numeric import sorted_position

    u = KeyedStream(SecretKey(bytes(range(32))), "0" * 32, "sorted-position").words(0, 50_000, 1)[:, 0]
    unit = (u >> np.uint64(11)).astype(float) / float(1 << 53)
    alphabets = [Piecewise(eps, (0, 100)).output_values for eps in (0.2, 1.0, 6.0)]
    alphabets.append(np.cumsum(np.concatenate([[0.0], np.repeat([1e-9, 1.0, 1e-6], 100)])))
    for alpha in alphabets:
        lo, hi = alpha[0], alpha[-1]
        span = hi - lo
        B = 4 * len(alpha)
        vals = np.concatenate([
            lo - 0.1 * span + unit * 1.2 * span,              # spread over the range and beyond
            alpha, np.nextafter(alpha, -np.inf), np.nextafter(alpha, np.inf),
            lo + np.arange(B + 1) * (span / B),               # the guide's slice edges
            [np.nan, np.inf, -np.inf, lo, hi]])
        np.testing.assert_array_equal(sorted_position(alpha, vals), np.searchsorted(alpha, vals))
