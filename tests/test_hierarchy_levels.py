"""hierarchy's level oracles: grr, olh, and subset selection where it beats both by more than 1%.

The rule (docs/formulas.md section 24): each level of k = B^l nodes takes GRR or OLH, whichever has
the lower exact total variance, unless subset selection at its best size has a total variance more
than 1% below that one's (its report is k characters wide, so a near tie goes to the compact
report).  Old specs (levels grr/olh only) keep their output fields and bytes: the digests below
were computed with the code before subset levels existed, for the same inputs and words.
Fixed keys and stated tolerances throughout; nothing here is random between runs.
"""

from __future__ import annotations

import functools
import hashlib
import json
import math
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from conftest import keyed_words
from scipy import stats

from ldptransform.errors import PolicyError
from ldptransform.keys import SecretKey
from ldptransform.mechanisms import GRR, OLH, Hierarchy, SubsetSelection, build
from ldptransform.mechanisms.distribution import _level_oracle
from ldptransform.random import KeyedStream

KEY = SecretKey(bytes(range(40, 72)))
PAY = (20000.0, 200000.0)
words = functools.partial(keyed_words, key=KEY, nonce="0f1e2d3c4b5a69788796a5b4c3d2e1f0",
                          stream="test-hierarchy-levels")


def pay_data(n: int, seed: int) -> np.ndarray:
    return np.clip(np.random.default_rng(seed).lognormal(math.log(50000.0), 0.45, n), *PAY)


# -- the choice rule --------------------------------------------------------------------------

def _closed_form_total_variances(eps: float, k: int) -> tuple[float, float, float, int]:
    """n * sum_v Var of grr, olh (g = its hash range) and subset at its best m, from the ideal
    p*, q* (docs/formulas.md sections 0.3, 2.1, 2.4, 3.2 and 4), not from the code's thresholds."""
    E = math.exp(eps)

    def tv(p: float, q: float) -> float:
        return k * q * (1 - q) / (p - q) ** 2 + (1 - p - q) / (p - q)

    g = OLH.best_hash_range(eps)
    grr = tv(E / (E + k - 1), 1 / (E + k - 1))
    olh = tv(E / (E + g - 1), 1 / g)
    sub = [(k - 1) * ((m * E + k - m) ** 2 - (m * E * E + k - m)) / (m * (k - m) * (E - 1) ** 2) for m in range(1, k)]
    m = int(np.argmin(sub)) + 1
    return grr, olh, sub[m - 1], m


@pytest.mark.parametrize("eps,k,want,m", [
    (1.0, 4, "grr", None), (1.0, 16, "subset", 4), (1.0, 64, "subset", 17), (1.0, 1024, "olh", None),
    (0.5, 4, "subset", 2), (0.5, 2, "grr", None), (3.0, 16, "grr", None), (3.0, 64, "subset", 3),
    (4.0, 128, "subset", 2), (8.0, 1024, "grr", None), (0.1, 1024, "olh", None)])
def test_choice_rule_at_a_few_points(eps: float, k: int, want: str, m: int | None) -> None:
    o = _level_oracle(eps, k)
    assert o.name == want and o.k == k
    grr, olh, sub, m_best = _closed_form_total_variances(eps, k)
    best = min(grr, olh)
    # the rule, restated from the closed forms (none of these points is within 1e-6 of a boundary)
    assert (sub * 1.01 < best) == (want == "subset")
    if want == "subset":
        assert o.m == m == m_best
        assert o.total_variance() == pytest.approx(sub, rel=1e-9)
    else:
        assert want == ("grr" if grr <= olh else "olh")


def test_choice_rule_near_the_margin_goes_to_the_compact_report() -> None:
    """Where subset gains less than 1% (eps 1, 256 nodes: 1.3%; eps 0.1, 256 nodes: 1.0%; eps 1,
    1024 nodes: under 1%) the rule is applied on the exact total variances of the realized oracles."""
    for eps, k in ((1.0, 256), (0.1, 256), (1.0, 1024), (1.5, 8)):
        cats = [str(v) for v in range(k)]
        g, h, s = GRR(eps, cats), OLH(eps, cats), SubsetSelection(eps, cats)
        best = min(g.total_variance(), h.total_variance())
        assert _level_oracle(eps, k).name == ("subset" if s.total_variance() * 1.01 < best
                                              else "grr" if g.total_variance() <= h.total_variance() else "olh")
    assert _level_oracle(1.0, 256).name == "subset" and _level_oracle(1.0, 1024).name == "olh"


# -- spec round trip ----------------------------------------------------------------------------

def test_spec_with_subset_levels_round_trips() -> None:
    m = Hierarchy(1.0, PAY, 4, 64)
    spec = m.to_spec()
    assert spec["levels"] == [{"nodes": 4, "oracle": "grr"}, {"nodes": 16, "oracle": "subset", "subset_size": 4},
                              {"nodes": 64, "oracle": "subset", "subset_size": 17}]
    again = build(json.loads(json.dumps(spec)))
    assert again.to_spec() == spec
    assert isinstance(again, Hierarchy) and [o.name for o in again.oracles] == ["grr", "subset", "subset"]
    # a subset size other than the best is kept as written
    other = json.loads(json.dumps(spec))
    other["levels"][2]["subset_size"] = 20
    assert build(other).to_spec() == other
    assert build(other).words_per_row == 1 + 1 + 20
    for bad in ({"nodes": 16, "oracle": "subset"}, {"nodes": 16, "oracle": "subset", "subset_size": 16},
                {"nodes": 16, "oracle": "subset", "subset_size": 0}, {"nodes": 16, "oracle": "oue"}):
        broken = json.loads(json.dumps(spec))
        broken["levels"][1] = bad
        with pytest.raises(PolicyError):
            build(broken)


def test_outputs_words_and_width() -> None:
    m = Hierarchy(1.0, PAY, 4, 1024)             # grr, subset 4, subset 17, subset 69, olh
    assert [o.name for o in m.oracles] == ["grr", "subset", "subset", "subset", "olh"]
    assert [f.name for f in m.output_fields("pay")] == ["pay__level", "pay__subset", "pay", "pay__hash"]
    assert m.words_per_row == 1 + 1 + 69
    assert m.output_bytes_per_row >= 256
    assert "empty on other levels" in m.output_meaning("pay__subset")
    assert "subset" in m.output_meaning("pay__hash") and "0 on subset levels" in m.output_meaning("pay")
    old = Hierarchy(1.0, PAY, 4, 64, levels=OLD_SPECS["eps1-64"]["levels"])
    assert old.output_bytes_per_row == 8 and old.words_per_row == 5


# -- exact channel and unbiasedness of a subset level ----------------------------------------------

def test_subset_levels_channel_is_exact_and_unbiased_by_enumeration() -> None:
    """A small tree (eps 0.5, branching 2, 8 leaves: levels of 2, 4, 8 nodes as grr, subset of 2,
    subset of 3): (a) the level's reports are subset.py's sampler on words 1.. of the same rows;
    (b) the whole channel P(level, report | leaf), levels at 1/h, enumerated exactly: rows sum to 1,
    the ratio of any two leaves is at most e^eps; (c) the level's estimator (1[v in S] - q*)/(p* - q*)
    has expectation exactly 1[v = node] under that channel; (d) constrained inference leaves true
    consistent shares unchanged, so with (c) the decoded leaves are unbiased."""
    m = Hierarchy(0.5, (0.0, 1.0), 2, 8)
    assert [(o.name, getattr(o, "m", None)) for o in m.oracles] == [("grr", None), ("subset", 2), ("subset", 3)]
    n = 4000
    x = (np.arange(n) % 8 + 0.5) / 8
    w = words("enumerate", n, m.words_per_row)
    arrays = m.randomize(x, w)
    level = arrays[0].to_numpy()
    sub = arrays[1].to_pylist()
    blocks = []
    for l, o in enumerate(m.oracles):
        node = np.arange(8) // (2 ** (m.height - l - 1))
        at = np.flatnonzero(level == l + 1)
        if o.name == "subset":
            bits = o.randomize_bits(m.leaf_of(x[at]) // (2 ** (m.height - l - 1)), w[at, 1: 1 + o.words_per_row])
            assert [sub[i] for i in at] == ["".join("1" if b else "0" for b in row) for row in bits]
            assert all(sub[i] is None for i in np.flatnonzero(level == 1))   # the grr level: no subset
            C = o.channel()
            outs = np.array([[c == "1" for c in s] for s in o.channel_outputs()])
            est = (outs - o.q_star) / (o.p_star - o.q_star)                 # (outputs, k)
            np.testing.assert_allclose(C @ est, np.eye(o.k), atol=1e-12)    # (c)
        else:
            C = o.channel()
        blocks.append(C[node] / m.height)
    Q = np.concatenate(blocks, axis=1)
    np.testing.assert_allclose(Q.sum(axis=1), 1.0, atol=1e-12)
    assert float(np.max(Q.max(axis=0) / Q.min(axis=0))) <= math.exp(0.5) * (1 + 1e-9)   # (b)
    assert m.max_log_ratio() <= 0.5 + 1e-12
    assert m.realized_ratio() == max(o.realized_ratio() for o in m.oracles)
    f = np.random.default_rng(1).dirichlet(np.ones(8))                    # (d)
    ys = [f.reshape(2 ** (l + 1), -1).sum(axis=1)[:, None] for l in range(m.height)]
    np.testing.assert_allclose(m.consistent(ys, np.ones(1), np.array([3.0, 1.0, 7.0]))[:, 0], f, atol=1e-12)


def test_subset_level_reports_follow_the_channel() -> None:
    """Rows of one leaf at a subset level: the reported subsets' counts against the exact channel
    (chi-square over the C(8, 3) = 56 subsets, fixed key, p-value above 1e-4)."""
    m = Hierarchy(0.5, (0.0, 1.0), 2, 8)
    o = m.oracles[2]
    n = 60_000
    arrays = m.randomize(np.full(n, 0.3), words("chi2", n, m.words_per_row))
    level = arrays[0].to_numpy()
    got = [s for s, lv in zip(arrays[1].to_pylist(), level) if lv == 3]
    index = {s: i for i, s in enumerate(o.channel_outputs())}
    counts = np.bincount([index[s] for s in got], minlength=len(index))
    expected = o.channel()[m.leaf_of(np.array([0.3]))[0]] * len(got)
    assert stats.chisquare(counts, expected).pvalue > 1e-4


# -- alphabet, audit outcomes, fit ---------------------------------------------------------------

def test_alphabet_of_subset_levels() -> None:
    m = Hierarchy(1.0, PAY, 4, 64)                # grr, subset of 4 (16 nodes), subset of 17 (64 nodes)
    n = 3000
    arrays = m.randomize(pay_data(n, 3), words("alphabet", n, m.words_per_row))
    assert m.count_invalid(arrays) == 0
    level = arrays[0].to_numpy()
    sub = arrays[1].to_pylist()
    assert all((s is None) == (lv == 1) for s, lv in zip(sub, level))
    assert all(len(s) == m.nodes[lv - 1] and s.count("1") == m.oracles[lv - 1].m for s, lv in zip(sub, level) if s)
    i1, i2, i3 = (int(np.flatnonzero(level == v)[0]) for v in (1, 2, 3))

    def with_sub(i: int, v: str | None) -> list[pa.Array]:
        s = list(sub)
        s[i] = v
        return [arrays[0], pa.array(s, pa.string()), arrays[2]]

    assert m.count_invalid(with_sub(i1, "1")) == 1                         # a subset on a grr level
    assert m.count_invalid(with_sub(i1, "")) == 0                          # empty (a CSV round trip) is fine
    assert m.count_invalid(with_sub(i2, None)) == 1                        # no subset on a subset level
    assert m.count_invalid(with_sub(i2, "1" * 4 + "0" * 11)) == 1          # wrong length
    assert m.count_invalid(with_sub(i2, "1" * 5 + "0" * 11)) == 1          # wrong number of ones
    assert m.count_invalid(with_sub(i3, "2" + sub[i3][1:])) == 1           # not '0'/'1'
    rep = arrays[2].to_numpy().copy()
    rep[i2] = 1
    assert m.count_invalid([arrays[0], arrays[1], pa.array(rep)]) == 1    # report not 0 on a subset level
    # a CSV reader that took the strings for integers (leading zeros dropped: possible when every
    # subset level has at most 18 nodes) reads the same
    m = Hierarchy(1.0, PAY, 4, 16)                # grr, subset of 4 (16 nodes)
    arrays = m.randomize(pay_data(n, 4), words("alphabet-int", n, m.words_per_row))
    as_int = pa.array([None if s is None else int(s) for s in arrays[1].to_pylist()], pa.int64())
    st, st_int = m.new_stats(), m.new_stats()
    m.add_stats(st, arrays)
    m.add_stats(st_int, [arrays[0], as_int, arrays[2]])
    assert np.array_equal(st, st_int) and m.count_invalid([arrays[0], as_int, arrays[2]]) == 0


def test_audit_outcomes_and_fit_of_subset_levels() -> None:
    m = Hierarchy(1.0, PAY, 4, 64)
    n = 6000
    x = pay_data(n, 5)
    arrays = m.randomize(x, words("audit", n, m.words_per_row))
    pair = (30000.0, 150000.0)
    out = m.audit_outcomes(arrays, pair)
    level = arrays[0].to_numpy()
    leaf = m.leaf_of(np.array(pair))
    for i in np.flatnonzero(level > 1)[:200]:
        l = int(level[i])
        node = leaf // (4 ** (m.height - l))
        s = arrays[1][int(i)].as_py()
        want = ["supports neither", "supports b only", "supports a only", "supports both"][
            2 * (s[node[0]] == "1") + (s[node[1]] == "1")]
        assert out[i] == f"level {l}, {want}"
    fit = m.fit_test().add(arrays)
    res = fit.results(0.01)
    assert len(res) == fit.n_tests and all(r.p_value >= 0.01 / fit.n_tests for r in res), res
    assert any("level 3 of 3 (64 nodes)" in r.test for r in res)
    s = arrays[1].to_pylist()
    s[int(np.flatnonzero(level == 3)[0])] = "1" * 64
    bad = m.fit_test().add([arrays[0], pa.array(s, pa.string()), arrays[2]]).results(0.01)
    assert all(r.p_value == 0.0 for r in bad if "level 3" in r.test)


# -- Monte Carlo through the decoder ----------------------------------------------------------------

def test_monte_carlo_decode_quantiles_and_ranges() -> None:
    """100 releases of the same 20,000 pay rows (eps 1, 64 leaves: grr, subset, subset), one key,
    nonces 0..99.  Range shares between leaf edges: every release within 5 SE of the truth, the
    average within 5 SE of the average (unbiased), the stated SE within 0.75-1.35 of the spread
    across releases (the spread's own relative SE is about 7% at 100 releases; the stated SE is the
    sampled-population one, which also counts the spread of true values: docs/formulas.md 0.4).
    The CDF at the true median: the same checks.  The median: every release within 5 delta-method
    SE (cdf SE / the true leaf density) of the truth."""
    m = Hierarchy(1.0, PAY, 4, 64)
    assert [o.name for o in m.oracles] == ["grr", "subset", "subset"]
    n, R = 20_000, 100
    x = pay_data(n, 3)
    edges = np.linspace(*PAY, 65)
    ranges = [(edges[5], edges[20]), (edges[0], edges[8]), (edges[10], edges[12])]
    truth = np.array([np.mean((x >= a) & (x < b)) for a, b in ranges])
    med = float(np.quantile(x, 0.5))
    j = int(np.searchsorted(edges, med) - 1)
    density = np.mean((x >= edges[j]) & (x < edges[j + 1])) / (edges[1] - edges[0])
    est, se = np.empty((R, 4)), np.empty((R, 4))
    qs, qse = np.empty(R), np.empty(R)
    for r in range(R):
        w = KeyedStream(KEY, f"{r:032x}", "test-hierarchy-levels", "mc").words(0, n, m.words_per_row)
        st = m.new_stats()
        m.add_stats(st, m.randomize(x, w))
        d = m.decode(st, n)
        ivs = [d.range_ci(a, b) for a, b in ranges]
        est[r, :3], se[r, :3] = [iv.estimate for iv in ivs], [iv.se for iv in ivs]
        est[r, 3], se[r, 3] = d.cdf(med), d.cdf_se(med)
        qs[r], qse[r] = d.quantile(0.5), d.cdf_se(med) / density
    want = np.append(truth, np.mean(x < med))
    assert np.all(np.abs(est - want) <= 5 * se)
    sd = est.std(axis=0, ddof=1)
    assert np.all(np.abs(est.mean(axis=0) - want) <= 5 * sd / math.sqrt(R)), (est.mean(axis=0), want)
    ratio = se.mean(axis=0) / sd
    assert np.all((ratio > 0.75) & (ratio < 1.35)), ratio
    assert np.all(np.abs(qs - med) <= 5 * qse)


# -- old specs: the same fields and bytes as before subset levels ------------------------------------

# computed with the code before subset levels (same inputs, key, nonce and stream as _digests)
OLD_SPECS: dict[str, dict[str, Any]] = {
    "eps1-64": {"bounds": [20000.0, 200000.0], "branching": 4, "epsilon": 1.0, "leaves": 64, "levels": [
        {"nodes": 4, "oracle": "grr"}, {"hash_range": 4, "nodes": 16, "oracle": "olh"},
        {"hash_range": 4, "nodes": 64, "oracle": "olh"}], "mechanism": "hierarchy"},
    "eps3-b2-16": {"bounds": [20000.0, 200000.0], "branching": 2, "epsilon": 3.0, "leaves": 16, "levels": [
        {"nodes": 2, "oracle": "grr"}, {"nodes": 4, "oracle": "grr"}, {"nodes": 8, "oracle": "grr"},
        {"nodes": 16, "oracle": "grr"}], "mechanism": "hierarchy"},
    "eps1-1024": {"bounds": [20000.0, 200000.0], "branching": 4, "epsilon": 1.0, "leaves": 1024, "levels": [
        {"nodes": 4, "oracle": "grr"}] + [{"hash_range": 4, "nodes": 4 ** j, "oracle": "olh"} for j in range(2, 6)],
        "mechanism": "hierarchy"},
}
OLD_DIGESTS = {
    "eps1-64": ("57fbfa5c7ce9cd6ab8014130a97d8394eef1bc5916a9683613f7ae1e96b1e40e",
                "12b3ef47772e5ce60d3ce76d09722b06bea92e4eda45d9f2d0dfff57f9a76d74"),
    "eps3-b2-16": ("8ba4165177eaf45c11dfb15b7b2c5c33fb21798a79f68e118c4feaf1ae722019",
                   "efab1d1c612fb5155078e26ccd0fbf092739f7fe26e38e6513b8c7e181297506"),
    "eps1-1024": ("999dcaf4da3505229a0b4719ef1837fb9e71b01dd2bc4291cb502265d4980e22",
                  "cbb17b4b0d41c9d96b140e3c5f452c46ecc1dbcd1d4260f3c030880b7e7f3b87"),
}


def _digests(m: Hierarchy, label: str, n: int = 3000) -> tuple[str, str]:
    x = np.clip(np.random.default_rng(7).lognormal(np.log(50000.0), 0.45, n), *PAY)
    w = KeyedStream(KEY, "00112233445566778899aabbccddeeff", "test-hierarchy-levels", label).words(
        0, n, m.words_per_row)
    arrays = m.randomize(x, w)
    h = hashlib.sha256()
    for a in arrays:
        h.update(np.ascontiguousarray(a.to_numpy(zero_copy_only=False)).tobytes())
    st = m.new_stats()
    m.add_stats(st, arrays)
    return h.hexdigest(), hashlib.sha256(st.tobytes()).hexdigest()


@pytest.mark.parametrize("name", sorted(OLD_SPECS))
def test_old_specs_keep_their_fields_and_bytes(name: str) -> None:
    m = build(OLD_SPECS[name])
    assert isinstance(m, Hierarchy) and m.to_spec() == OLD_SPECS[name]
    has_olh = any(lev["oracle"] == "olh" for lev in OLD_SPECS[name]["levels"])
    assert [f.name for f in m.output_fields("pay")] == ["pay__level", "pay"] + (["pay__hash"] if has_olh else [])
    assert m.words_per_row == (5 if has_olh else 3)
    assert _digests(m, name) == OLD_DIGESTS[name]
    # the same tree built with its levels given explicitly as grr / olh: the same bytes
    spec = OLD_SPECS[name]
    explicit = Hierarchy(spec["epsilon"], PAY, spec["branching"], spec["leaves"], levels=spec["levels"])
    assert _digests(explicit, name) == OLD_DIGESTS[name]


def test_new_default_changes_only_where_a_subset_level_is_chosen() -> None:
    assert Hierarchy(3.0, PAY, 2, 16).to_spec() == OLD_SPECS["eps3-b2-16"]    # no subset level: as before
    assert _digests(Hierarchy(3.0, PAY, 2, 16), "eps3-b2-16") == OLD_DIGESTS["eps3-b2-16"]
    new = Hierarchy(1.0, PAY, 4, 64)
    assert new.to_spec() != OLD_SPECS["eps1-64"]
    assert [f.name for f in new.output_fields("pay")] == ["pay__level", "pay__subset", "pay"]


def test_subset_co_support_counts_match_the_reports() -> None:
    """The decoder's co-support block of a subset level is S^T S of that level's valid reports."""
    m = Hierarchy(1.0, PAY, 4, 64)
    n = 2000
    arrays = m.randomize(pay_data(n, 9), words("co", n, m.words_per_row))
    st = m.new_stats()
    m.add_stats(st, arrays)
    level = arrays[0].to_numpy()
    for l, (soff, k, coff, csize) in enumerate(m._layout):
        if m.oracles[l].name != "subset":
            continue
        S = np.array([[c == "1" for c in s] for s, lv in zip(arrays[1].to_pylist(), level) if lv == l + 1], dtype=int)
        assert np.array_equal(st[soff: soff + k], S.sum(axis=0))
        assert np.array_equal(st[coff: coff + csize].reshape(k, k), S.T @ S)


# -- through the release: slicing, pickling, CSV and Parquet, estimate ----------------------------

def test_wide_reports_are_sliced_without_changing_a_byte(monkeypatch: pytest.MonkeyPatch) -> None:
    """The release slices a batch by max(words, output bytes) per row (output_bytes_per_row): with a
    tiny slice budget the reports are the same, and the mechanism pickles (the dask engine ships it)."""
    import pickle

    from ldptransform.release import kernel

    m = Hierarchy(1.0, PAY, 4, 256)              # grr, subset of 4, 17, 69 (256 nodes: 1 + 70 words per row)
    assert m.output_bytes_per_row > 256 and m.words_per_row == 71
    again = pickle.loads(pickle.dumps(m))
    n = 700
    x = pay_data(n, 8)
    w = words("slices", n, m.words_per_row)
    whole = m.randomize(x, w)
    step = max(1, 1000 // max(m.words_per_row, -(-m.output_bytes_per_row // 8)))
    parts = [again.randomize(x[s: s + step], w[s: s + step]) for s in range(0, n, step)]
    for f, a in enumerate(whole):
        assert pa.concat_arrays([p[f] for p in parts]).equals(a)
    assert kernel.MAX_WORDS_PER_CALL >= m.words_per_row


@pytest.fixture(scope="module")
def pay_csv(tmp_path_factory: pytest.TempPathFactory) -> tuple[object, np.ndarray]:
    import pandas as pd

    d = tmp_path_factory.mktemp("hierarchy-levels")
    x = np.round(pay_data(12_000, 31), 2)
    pd.DataFrame({"pay": x}).to_csv(d / "pay.csv", index=False)
    pol = {"budget": {"epsilon_per_row": 1.0}, "columns": {
        "pay": {"type": "numeric", "bounds": list(PAY), "epsilon": 1.0, "mechanism": "hierarchy"}}}
    (d / "p.json").write_text(json.dumps(pol))
    return d, x


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_release_and_estimate_with_subset_levels(pay_csv, tmp_path, fmt: str) -> None:
    from ldptransform import estimate
    from ldptransform.policy import load_policy
    from ldptransform.release import privatize

    d, x = pay_csv
    out = tmp_path / f"x.{fmt}"
    res = privatize(d / "pay.csv", load_policy(d / "p.json"), KEY, out, nonce="ab" * 16, batch_rows=1000)
    entry = {c.name: c for c in res.manifest.columns}["pay"]
    assert [o.name for o in entry.outputs] == ["pay__level", "pay__subset", "pay"]
    assert entry.mechanism is not None and [lv["oracle"] for lv in entry.mechanism["levels"]] == [
        "grr", "subset", "subset"]
    r = estimate(out, res.manifest_path, quantiles=[0.5], ranges=[("pay", 20000.0, 62187.5)])
    dist = r.columns["pay"].distribution
    assert dist is not None
    q, rg = dist.quantiles[0], dist.ranges[0]
    true_med = float(np.quantile(x, 0.5))
    assert q.ci_low is not None and q.ci_high is not None and q.ci_low <= true_med <= q.ci_high
    assert rg.estimate is not None and rg.se is not None
    assert abs(rg.estimate - np.mean(x < 62187.5)) <= 5 * rg.se
    assert dist.method is not None and "subset of 4" in dist.method

