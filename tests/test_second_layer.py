"""The second randomization layer of memoized columns (``rerandomize_epsilon``).

A memoized column's report is permanent (the same for a person and value in every release);
with a second layer each release re-randomizes it with fresh noise at its own eps, the
instantaneous randomized response of Erlingsson, Pihur, Korolova, "RAPPOR: Randomized
Aggregatable Privacy-Preserving Ordinal Response", CCS 2014.  The composite channel stays in
the mechanism's family (docs/formulas.md section 9.3), so the family decoder reads it.

Data: invented people drawn with numpy's seeded generator (input data only; release noise
comes from the tool's keyed PRF).  Keys and nonces are fixed, so every statistical check is
deterministic; tolerances are stated where they are used (4.5 standard errors; 10% on a
predicted SE).
"""

from __future__ import annotations

import json
import math
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from conftest import assert_policy_refused
from ldptransform import estimate, mechanisms as mech
from ldptransform.errors import PolicyError
from ldptransform.keys import SecretKey
from ldptransform.plan import plan
from ldptransform.policy import Policy, parse_policy
from ldptransform.random import KeyedStream
from ldptransform.random.variates import exp_lower_bound
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(140, 172)))  # fixed key: the statistical checks cannot flake
NIGHT_1, NIGHT_2 = "00000000000000000000000000000101", "00000000000000000000000000000202"
# every release of this file has a nonce of its own (a nonce is single-use unless input and policy repeat)
PLAIN = {NIGHT_1: "00000000000000000000000000001101", NIGHT_2: "00000000000000000000000000001202"}
NIGHT_V, NIGHT_L = "00000000000000000000000000002101", ("00000000000000000000000000003101",
                                                         "00000000000000000000000000003202")
Z_LIMIT = 4.5
COLOURS = ["red", "green", "blue", "white", "black"]
# these tests align a person's rows across releases: keep the input's order where the policy can say so
ROW_ORDER: dict[str, Any] = {"output": {"row_order": "as-input"}} if "output" in Policy.model_fields else {}


def people(n: int, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    return pd.DataFrame({
        "person": [f"person-{i:06d}" for i in range(n)],
        "colour": rng.choice(COLOURS, size=n, p=[.4, .25, .15, .12, .08]),
        "shade": rng.choice(COLOURS, size=n, p=[.1, .2, .3, .25, .15]),
        "tone": rng.choice(COLOURS, size=n, p=[.3, .3, .2, .1, .1]),
        "score": np.round(rng.beta(2, 5, size=n) * 100, 2),
    })


def layered_policy(layer: bool = True, **over: Any) -> dict[str, Any]:
    def col(mechanism: str, eps2: float) -> dict[str, Any]:
        c: dict[str, Any] = {"type": "categorical", "categories": list(COLOURS), "epsilon": 1.5,
                             "mechanism": mechanism, "memoize": True}
        if layer:
            c["rerandomize_epsilon"] = eps2
        return c

    score: dict[str, Any] = {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": "two-point",
                             "memoize": True}
    if layer:
        score["rerandomize_epsilon"] = 1.5
    p: dict[str, Any] = {"budget": {"epsilon_per_row": 6.0}, "subject_key": "person", **ROW_ORDER,
                         "columns": {"colour": col("grr", 2.0), "shade": col("oue", 2.0), "tone": col("sue", 3.0),
                                     "score": score}}
    p.update(over)
    return p


def places(tmp: Path) -> tuple[Path, Path]:
    """(the folder partners receive, a steward-only folder of mode 0700 beside it)."""
    pub, priv = tmp / "pub", tmp / "priv"
    pub.mkdir(parents=True, exist_ok=True)
    priv.mkdir(mode=0o700, exist_ok=True)
    return pub, priv


def release(df: pd.DataFrame, pol: dict[str, Any], tmp: Path, nonce: str, name: str,
            **kw: Any) -> tuple[pd.DataFrame, dict]:
    pub, priv = places(tmp)
    raw = priv / f"{name}.csv"
    df.to_csv(raw, index=False)
    out = pub / f"{name}.parquet"
    privatize(raw, parse_policy(pol, "layer.yaml"), KEY, out, nonce=nonce, diagnostics_path=priv / f"{name}.diag.json",
              **kw)
    manifest = json.loads((pub / f"{name}.manifest.json").read_text())
    return pd.read_parquet(out), manifest


# -- the composite channel, in exact arithmetic -------------------------------------------------

def _exact(a: np.ndarray) -> list[list[Fraction]]:
    return [[Fraction(float(v)) for v in row] for row in np.atleast_2d(a)]


def _matmul(a: list[list[Fraction]], b: list[list[Fraction]]) -> list[list[Fraction]]:
    return [[sum((a[i][t] * b[t][j] for t in range(len(b))), Fraction(0)) for j in range(len(b[0]))]
            for i in range(len(a))]


@pytest.mark.parametrize("eps1,eps2", [(1.0, 0.5), (2.0, 2.0), (0.3, 4.0)])
def test_grr_composite_is_grr_at_the_stated_eps(eps1: float, eps2: float) -> None:
    """Permanent k-ary RR (its integer thresholds Tp, Tq in units of 2^-64) times the second
    layer's k x k channel (its thresholds Lp, Lq: kept w.p. Lp / 2^64, each other category
    Lq / 2^64), computed with fractions, equals the closed form p' = p r + (k-1) q o,
    q' = q r + p o + (k-2) q o exactly (k-ary RR again); the stated composite eps is certified
    (e^eps' >= p'/q' exactly) and within 1e-12 of ln(p'/q'), below min(eps1, eps2); the composite
    mechanism's channel matches to 1e-12."""
    k, W = len(COLOURS), 1 << 64
    perm = mech.GRR(eps1, COLOURS)
    Lp, Lq = perm.second_layer_thresholds(eps2)
    r, o = Fraction(Lp, W), Fraction(Lq, W)
    assert Lp + (k - 1) * Lq == W and r / o <= exp_lower_bound(eps2)  # the layer alone: eps2-LDP, exactly
    own, other = perm.thresholds  # the realized masses of the permanent channel (own + (k-1) other = 1 unit)
    p, q = Fraction(own, own + (k - 1) * other), Fraction(other, own + (k - 1) * other)
    permanent = [[p if i == j else q for j in range(k)] for i in range(k)]
    layer = [[r if i == j else o for j in range(k)] for i in range(k)]
    exact = _matmul(permanent, layer)
    p2 = p * r + (k - 1) * q * o
    q2 = q * r + p * o + (k - 2) * q * o
    assert all(exact[i][j] == (p2 if i == j else q2) for i in range(k) for j in range(k))
    assert perm.second_layer_ratio(eps2) == p2 / q2
    comp = perm.with_second_layer(eps2)
    assert isinstance(comp, mech.GRR) and comp.family == perm.family
    assert exp_lower_bound(comp.epsilon) >= p2 / q2
    assert comp.epsilon == pytest.approx(math.log(p2 / q2), rel=1e-12)
    assert np.max(np.abs(comp.channel() - np.array(exact, dtype=float))) < 1e-12
    assert comp.max_log_ratio() <= comp.epsilon + 1e-12
    assert comp.epsilon < min(eps1, eps2)


@pytest.mark.parametrize("cls", [mech.OUE, mech.SUE])
@pytest.mark.parametrize("eps1,eps2", [(1.0, 1.0), (2.5, 0.8)])
def test_unary_composite_is_the_same_encoding_at_the_stated_eps(cls: Any, eps1: float, eps2: float) -> None:
    """The full channel over the 2^k bit vectors (k = 3): the permanent encoding's realized
    channel times the layer's (each bit kept w.p. r, else flipped), with fractions, is the unary
    encoding with p' = p r + (1-p)(1-r), q' = q r + (1-q)(1-r); the composite mechanism (same
    class) realizes it to 1e-12, with eps' = ln(p'(1-q')/(q'(1-p'))) <= min(eps1, eps2)."""
    cats = COLOURS[:3]
    k, W = len(cats), 1 << 64
    perm = cls(eps1, cats)
    Lk, Lf = perm.second_layer_thresholds(eps2)
    r = Fraction(Lk, W)
    assert Lk + Lf == W and (r / (1 - r)) ** 2 <= exp_lower_bound(eps2)
    outs = [[(o >> j) & 1 for j in range(k)] for o in range(1 << k)]
    layer = [[math.prod([r if a == b else 1 - r for a, b in zip(outs[i], outs[j])], start=Fraction(1))
              for j in range(1 << k)] for i in range(1 << k)]
    p, q = Fraction(perm.thresholds[0], W), Fraction(perm.thresholds[1], W)  # the realized bit probabilities
    permanent = [[math.prod([(p if j == x else q) if outs[o][j] else 1 - (p if j == x else q) for j in range(k)],
                            start=Fraction(1)) for o in range(1 << k)] for x in range(k)]
    assert np.max(np.abs(perm.channel() - np.array(permanent, dtype=float))) < 1e-15
    exact = _matmul(permanent, layer)
    p2, q2 = p * r + (1 - p) * (1 - r), q * r + (1 - q) * (1 - r)
    for x in range(k):
        for o in range(1 << k):
            want = math.prod([(p2 if j == x else q2) if outs[o][j] else 1 - (p2 if j == x else q2)
                              for j in range(k)], start=Fraction(1))
            assert exact[x][o] == want
    comp = perm.with_second_layer(eps2)
    assert type(comp) is cls
    assert np.max(np.abs(comp.channel() - np.array(exact, dtype=float))) < 1e-12
    ratio = p2 * (1 - q2) / (q2 * (1 - p2))
    assert perm.second_layer_ratio(eps2) == ratio and exp_lower_bound(comp.epsilon) >= ratio
    assert comp.epsilon == pytest.approx(math.log(ratio), rel=1e-12) and comp.max_log_ratio() <= comp.epsilon + 1e-12
    assert comp.epsilon < min(eps1, eps2)


@pytest.mark.parametrize("eps1,eps2", [(1.0, 1.0), (0.5, 3.0)])
def test_two_point_composite_is_two_point_and_unbiased(eps1: float, eps2: float) -> None:
    """Sign kept w.p. r, else flipped, after the permanent two-point: P(+ | t) from the exact
    product of the realized channels; written as +-C' with C' = 1/((2r-1) s), the mean is t
    exactly (up to the float C'), and it is two-point at eps' with tanh(eps'/2) = (2r-1) tanh(eps1/2)."""
    perm = mech.TwoPoint(eps1, [0, 10])
    Lk, Lf = perm.second_layer_thresholds(eps2)
    r = Fraction(Lk, 1 << 64)
    assert Lk + Lf == 1 << 64 and r / (1 - r) <= exp_lower_bound(eps2)
    exact = _matmul(_exact(perm.channel()), [[r, 1 - r], [1 - r, r]])
    comp = perm.with_second_layer(eps2)
    assert isinstance(comp, mech.TwoPoint)
    assert np.max(np.abs(comp.channel() - np.array(exact, dtype=float))) < 1e-12
    cstar = 1 / float(exact[1][1] - exact[0][1])  # 1 / the composite's slope
    assert comp.output_values == pytest.approx([5 - 5 * cstar, 5 + 5 * cstar], rel=1e-12)
    for i, t in enumerate((-1.0, 1.0)):  # the composite's written values are unbiased under the exact product
        mean = sum(float(exact[i][j]) * comp.outputs[j] for j in range(2))
        assert mean == pytest.approx(t, abs=1e-12)
    assert math.tanh(comp.epsilon / 2) == pytest.approx(float(2 * r - 1) * math.tanh(eps1 / 2), rel=1e-9)
    ratio = max(max(exact[0][o], exact[1][o]) / min(exact[0][o], exact[1][o]) for o in range(2))
    assert perm.second_layer_ratio(eps2) == ratio and exp_lower_bound(comp.epsilon) >= ratio
    assert comp.epsilon < min(eps1, eps2)


def test_composite_spec_round_trips_and_states_both_layers() -> None:
    for perm in (mech.GRR(1.0, COLOURS), mech.OUE(1.0, COLOURS), mech.SUE(1.0, COLOURS), mech.TwoPoint(1.0, [0, 1])):
        comp = perm.with_second_layer(0.7)
        spec = comp.to_spec()
        assert spec["second_layer"] == {"permanent_epsilon": 1.0, "epsilon": 0.7}
        assert spec["epsilon"] == comp.epsilon
        again = mech.build(json.loads(json.dumps(spec)))
        assert again.to_spec() == spec and again.permanent.to_spec() == perm.to_spec()
        assert comp.permanent is perm and perm.permanent is perm
        bad = dict(spec, epsilon=spec["epsilon"] * 1.5)
        with pytest.raises(PolicyError, match="compose"):
            mech.build(bad)


def test_the_refusal_names_the_mechanisms_from_the_contract() -> None:
    """The mechanisms that take a second layer are those whose class says so; a refusal names the
    ones of the same kind of column, read from the registry."""
    takers = {n for n, c in mech.registry().items() if c.supports_second_layer}
    assert takers == {"grr", "oue", "sue", "two-point"}
    refusing = [mech.OLH(1.0, COLOURS), mech.Piecewise(1.0, [0, 1]), mech.Hybrid(1.0, [0, 1])]
    for m in refusing:
        text = m.second_layer_refusal
        wanted = ["grr", "sue", "oue"] if m.family == "frequency" else ["two-point"]
        assert all(n in text for n in wanted) and m.name in text and "rerandomize_epsilon" in text, text
        with pytest.raises(PolicyError):
            m.with_second_layer(1.0)
    assert "hash seed" in mech.OLH(1.0, COLOURS).second_layer_refusal
    assert mech.GRR(1.0, COLOURS).second_layer_refusal == ""


# -- releases --------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> dict[Any, Any]:
    tmp = tmp_path_factory.mktemp("layer")
    df = people(20000)
    out: dict[Any, Any] = {"df": df, "tmp": tmp}
    for layer in (True, False):
        for nonce in (NIGHT_1, NIGHT_2):
            out[layer, nonce] = release(df, layered_policy(layer), tmp, nonce if layer else PLAIN[nonce],
                                        f"l{int(layer)}_{nonce[-3:]}")
    return out


def test_frequencies_and_means_decode_unbiasedly(nights: dict[Any, Any], tmp_path: Path) -> None:
    """Each layered column decoded by its family decoder from the manifest's composite spec: every
    share within 4.5 SE of the truth, the mean too (20000 rows, fixed key and nonce)."""
    df = nights["df"]
    path = nights["tmp"] / "pub" / f"l1_{NIGHT_1[-3:]}.parquet"  # as released, beside its manifest
    res = estimate(path).to_dict()["columns"]
    for col in ("colour", "shade", "tone"):
        truth = df[col].value_counts(normalize=True)
        for f in res[col]["frequencies"]:
            z = (f["estimate"] - truth.get(f["value"], 0.0)) / f["se"]
            assert abs(z) < Z_LIMIT, (col, f, z)
    mean = res["score"]["mean"]
    z = (mean["estimate"] - df["score"].mean()) / mean["se"]
    assert abs(z) < Z_LIMIT, (mean, z)


def test_without_the_layer_reports_repeat_with_it_a_stated_share_differs(nights: dict[Any, Any]) -> None:
    """Same people, same values, two nonces.  Without the layer every memoized report repeats
    exactly; with it the share of reports that differ matches the layer's formula within 4.5
    binomial SE: 1 - r^2 - (k-1) o^2 (grr, o each other category's probability),
    1 - (r^2 + (1-r)^2)^k (unary), 2 r (1-r) (two-point), r the keep probability.  So a changed
    report no longer shows a changed value."""
    plain_1, plain_2 = nights[False, NIGHT_1][0], nights[False, NIGHT_2][0]
    layer_1, layer_2 = nights[True, NIGHT_1][0], nights[True, NIGHT_2][0]
    k, n = len(COLOURS), len(plain_1)
    W = float(1 << 64)
    expected = {}
    Lp, Lq = mech.GRR(1.5, COLOURS).second_layer_thresholds(2.0)
    expected["colour"] = 1 - (Lp / W) ** 2 - (k - 1) * (Lq / W) ** 2
    r = mech.OUE(1.5, COLOURS).second_layer_thresholds(2.0)[0] / W
    expected["shade"] = 1 - (r * r + (1 - r) ** 2) ** k
    r = mech.SUE(1.5, COLOURS).second_layer_thresholds(3.0)[0] / W
    expected["tone"] = 1 - (r * r + (1 - r) ** 2) ** k
    r = mech.TwoPoint.second_layer_thresholds(1.5)[0] / W
    expected["score"] = 2 * r * (1 - r)
    for col, want in expected.items():
        assert (plain_1[col].astype(str) == plain_2[col].astype(str)).all(), col
        differ = float((layer_1[col].astype(str) != layer_2[col].astype(str)).mean())
        se = math.sqrt(want * (1 - want) / n)
        assert abs(differ - want) < Z_LIMIT * se, (col, differ, want)
        print(f"{col}: {differ:.4f} of unchanged reports differ between releases (formula {want:.4f})")


def test_manifest_states_both_layers_and_charges_the_composite(nights: dict[Any, Any]) -> None:
    _, man = nights[True, NIGHT_1]
    cols = {c["name"]: c for c in man["columns"]}
    total = 0.0
    for name, eps2 in (("colour", 2.0), ("shade", 2.0), ("tone", 3.0), ("score", 1.5)):
        spec = cols[name]["mechanism"]
        perm = 1.0 if name == "score" else 1.5
        assert spec["second_layer"] == {"permanent_epsilon": perm, "epsilon": eps2}
        assert spec["epsilon"] < min(perm, eps2)
        assert "second layer" in cols[name]["note"] and f"{eps2:g}" in cols[name]["note"]
        total += spec["epsilon"]
    assert man["privacy"]["epsilon_per_row_used"] == pytest.approx(total, rel=1e-12)
    assert "Second layer" in man["privacy"]["composition"]
    _, plain = nights[False, NIGHT_1]
    assert all("second_layer" not in c["mechanism"] for c in plain["columns"])


def test_the_layer_keeps_the_permanent_reports(nights: dict[Any, Any], tmp_path: Path) -> None:
    """The permanent layer is keyed as without the second layer (the memo context is the permanent
    spec), so adding a layer costs no new lifetime eps: re-randomizing the plain release's reports
    with the release's layer words gives the layered release exactly."""
    from ldptransform.release.columns import ColumnPlan
    from ldptransform.release.memo import rerandomize_rows

    loaded = parse_policy(layered_policy(True), "layer.yaml")
    plain, layered = nights[False, NIGHT_1][0], nights[True, NIGHT_1][0]
    for rc in loaded.columns:
        if rc.mechanism is None:
            continue
        p = ColumnPlan(rc, rc.mechanism.output_fields(rc.name),
                       layer_stream=KeyedStream(KEY, NIGHT_1, "second-layer", rc.name))
        import pyarrow as pa

        field = p.fields[0]
        again = rerandomize_rows(p, [pa.array(plain[rc.name], type=field.type)], 0, 1 << 14)
        assert again[0].to_pylist() == pa.array(layered[rc.name], type=field.type).to_pylist(), rc.name


# -- plan ---------------------------------------------------------------------------------------

def test_plan_predicts_the_composite_se_within_ten_percent() -> None:
    """plan's SE of a layered column against the spread of the estimate over 300 simulated releases
    of fresh people (permanent layer, then the second layer, decoded from the composite): within
    10%.  Worst-case data, as plan assumes, drawn afresh for each release (plan's SE, like the one
    estimate reports, counts the spread of the values): categories uniformly; values at either
    bound with probability 1/2 (truth: the population's shares and mean)."""
    n, reps = 2000, 300
    rng = np.random.default_rng(3)  # invented input data only
    loaded = parse_policy(layered_policy(True, **{"budget": {"epsilon_per_row": 6.0}}), "layer.yaml")
    predicted = {c.name: (c.statistics or ())[0].se for c in plan(loaded, n, simulate=False).columns}
    for rc in loaded.columns:
        comp: Any = rc.mechanism
        assert comp is not None and rc.rerandomize_epsilon is not None
        perm: Any = comp.permanent
        sq = []
        for rep in range(reps):
            if comp.family == "frequency":
                x: Any = rng.integers(0, perm.k, size=n)
                truth = np.full(perm.k, 1.0 / perm.k)
            else:
                x = np.where(rng.integers(0, 2, size=n) == 0, perm.lo, perm.hi)
                truth = np.array([(perm.lo + perm.hi) / 2])
            w1 = KeyedStream(KEY, f"{rep:032x}", "perm", rc.name).words(0, n, perm.words_per_row)
            w2 = KeyedStream(KEY, f"{rep:032x}", "layer", rc.name).words(0, n, perm.second_layer_words_per_row)
            reports = perm.rerandomize(perm.randomize(x, w1), w2, rc.rerandomize_epsilon)
            dec: Any = comp.decoder()
            dec.add(reports)
            est = np.asarray(dec.estimates()[0] if comp.family == "frequency" else [dec.mean(1.96).estimate],
                             dtype=float)
            sq.append(np.mean((est - truth) ** 2))
        mc = math.sqrt(float(np.mean(sq)))
        assert predicted[rc.name] == pytest.approx(mc, rel=0.10), (rc.name, predicted[rc.name], mc)
        print(f"{rc.name}: plan SE {predicted[rc.name]:.5f}, Monte Carlo {mc:.5f}")


# -- refused configurations ------------------------------------------------------------------

def _no_memo(p: dict) -> None:
    del p["columns"]["colour"]["memoize"]


def _olh(p: dict) -> None:
    p["columns"]["colour"]["mechanism"] = "olh"


def _piecewise(p: dict) -> None:
    p["columns"]["score"]["mechanism"] = "piecewise"


def _over_budget(p: dict) -> None:
    p["budget"]["epsilon_per_row"] = 1.2


BAD = {
    "without memoize": (_no_memo, ["'colour'", "rerandomize_epsilon", "memoize: true"]),
    "olh": (_olh, ["'colour'", "rerandomize_epsilon", "olh", "grr", "oue", "sue"]),
    "piecewise": (_piecewise, ["'score'", "rerandomize_epsilon", "piecewise", "two-point"]),
    "composite over the budget": (_over_budget, ["epsilon_per_row", "composite", "rerandomize_epsilon"]),
}


@pytest.mark.parametrize("case", list(BAD))
def test_bad_layer_policies_are_refused(case: str, tmp_path: Path, private_dir: Path, ldpt) -> None:
    edit, names = BAD[case]
    p = layered_policy(True)
    edit(p)
    assert_policy_refused(ldpt, tmp_path, private_dir, p, people(50), names)


def test_the_composite_budget_admits_what_the_declared_eps_would_not() -> None:
    """The per-release row eps counts a layered column at its composite eps: a budget below the
    sum of the declared (permanent) eps but above the composite sum is accepted."""
    p = layered_policy(True, **{"budget": {"epsilon_per_row": 5.0}})  # declared: 1.5 * 3 + 1.0 = 5.5
    loaded = parse_policy(p, "layer.yaml")
    assert loaded.epsilon_total < 5.0
    assert loaded.epsilon_total == pytest.approx(sum(rc.mechanism.epsilon for rc in loaded.columns if rc.mechanism))
    assert [rc.permanent_epsilon for rc in loaded.columns] == [1.5, 1.5, 1.5, 1.0]


# -- validate and the ledger ------------------------------------------------------------------

def test_validate_rederives_a_layered_release_and_its_channels_pass(tmp_path: Path, private_dir: Path) -> None:
    """The steward's validate with raw data and key re-derives the second layer bit for bit (it is
    reproducible from key and nonce) and every check passes, the stated composite eps included."""
    from ldptransform import validate

    df = people(3000)
    release(df, layered_policy(True), tmp_path, NIGHT_V, "v")
    pub, priv = places(tmp_path)
    rep = validate(pub / "v.parquet", raw=priv / "v.csv", key=KEY)
    failed = [c for c in rep.checks if c.ok is False]
    assert rep.ok and not failed, failed


def test_the_ledger_charges_the_permanent_eps_once_per_value(tmp_path: Path, private_dir: Path) -> None:
    """Lifetime accounting: the first release charges each person the permanent eps of every
    layered column (1.5 x 3 + 1.0 = 5.5, not the composite); a second release of unchanged values
    charges nothing more, although its reports differ from the first's."""
    df = people(400)
    pol = layered_policy(True, budget={"epsilon_per_row": 6.0, "lifetime_epsilon": 20.0})
    pub, priv = places(tmp_path)
    charged, ext = [], []
    for i, nonce in enumerate(NIGHT_L):
        ext.append(release(df, pol, tmp_path, nonce, f"n{i}", ledger_path=priv / "ledger.sqlite")[0])
        charged.append(json.loads((priv / f"n{i}.diag.json").read_text())["ledger"]["eps_charged_max"])
    assert charged[0] == pytest.approx(5.5, rel=1e-12)
    assert charged[1] == 0.0
    a, b = ext
    if ROW_ORDER:
        assert (a["colour"].astype(str) != b["colour"].astype(str)).any()


def test_plan_suggest_keeps_a_layered_column_and_says_why() -> None:
    """plan --suggest does not search one eps for a column with two layers (its SE follows both):
    it keeps the policy's layers, counts the composite eps in the row's total and says whether the
    target is met."""
    from ldptransform.plan import suggest

    p = layered_policy(True)
    p["columns"]["colour"]["quality"] = {"max_se": 0.05}
    loaded = parse_policy(p, "layer.yaml")
    out = suggest(loaded, 2000)
    entry = out["split"]["columns"]["colour"]
    comp = loaded.by_name["colour"].mechanism
    assert comp is not None and entry["epsilon"] == comp.epsilon
    assert "second layer" in entry["note"] and "meets the target at 2000 rows" in entry["note"]
    assert "misses the target at 200 rows" in suggest(loaded, 200)["split"]["columns"]["colour"]["note"]


def test_under_sample_every_layered_column_states_its_composite(tmp_path: Path, private_dir: Path) -> None:
    """strategy sample with every privatized column layered: a row's loss is m x the largest
    composite eps, the manifest says so, and validate agrees (no mismatch with the stated use)."""
    from ldptransform import validate

    pol = layered_policy(True, budget={"epsilon_per_row": 4.0, "strategy": "sample", "sample_columns": 2})
    for col in pol["columns"].values():
        col.pop("epsilon", None)
    loaded = parse_policy(pol, "layer.yaml")
    worst = max(rc.mechanism.epsilon for rc in loaded.columns if rc.mechanism is not None)
    assert worst < 2.0 and loaded.epsilon_total == pytest.approx(2 * worst, rel=1e-12)
    _, man = release(people(2000), pol, tmp_path, "00000000000000000000000000004101", "s")
    assert man["privacy"]["epsilon_per_row_used"] == pytest.approx(2 * worst, rel=1e-12)
    pub, priv = places(tmp_path)
    rep = validate(pub / "s.parquet", raw=priv / "s.csv", key=KEY)
    assert rep.ok, [c for c in rep.checks if c.ok is False]


def test_the_layer_does_not_depend_on_the_batch_size(tmp_path: Path, private_dir: Path) -> None:
    """The layer's words are addressed by (key, nonce, column, row): a release in batches of 333
    rows is byte for byte the one in a single batch (the same input, policy and nonce: a
    reproduction)."""
    df = people(2000)
    a, _ = release(df, layered_policy(True), tmp_path / "one", "00000000000000000000000000005101", "b")
    b, _ = release(df, layered_policy(True), tmp_path / "many", "00000000000000000000000000005101", "b",
                   batch_rows=333)
    pd.testing.assert_frame_equal(a, b)
