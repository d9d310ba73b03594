"""The central guarantee of shuffling (ldptransform/amplification.py): the closed form of
V. Feldman, A. McMillan, K. Talwar, "Hiding Among the Clones: A Simple and Nearly Optimal Analysis
of Privacy Amplification by Shuffling", FOCS 2021, Theorem 3.1, as restated in docs/formulas.md
section 16 (the order of the bound [S], from the paper's abstract; the constants and the condition
[M]).  Every figure is computed here again from that statement, independently of the module; a
hand-worked figure pins one value; the bound falls with n, grows with eps0 and with 1/delta; the
cases outside the condition say why."""

from __future__ import annotations

import math

import pytest

from ldptransform.amplification import ShuffleGuarantee, closed_form_epsilon, largest_epsilon0, shuffle_guarantee
from ldptransform.errors import UsageError


def paper_epsilon(eps0: float, n: int, delta: float) -> float:
    """Theorem 3.1: eps = log(1 + (e^eps0 - 1)/(e^eps0 + 1) (8 sqrt(e^eps0 log(4/delta))/sqrt(n) + 8 e^eps0/n))."""
    E = math.e ** eps0
    return math.log(1 + (E - 1) / (E + 1) * (8 * (E * math.log(4 / delta)) ** 0.5 / n ** 0.5 + 8 * E / n))


def paper_condition(eps0: float, n: int, delta: float) -> bool:
    """Theorem 3.1's condition: eps0 <= log(n / (16 log(2/delta)))."""
    return 16 * math.log(2 / delta) < n and eps0 <= math.log(n / (16 * math.log(2 / delta)))


@pytest.mark.parametrize("eps0", [0.1, 0.5, 1.0, 2.0, 4.0, 6.0])
@pytest.mark.parametrize("n", [10_000, 100_000, 1_000_000, 100_000_000])
@pytest.mark.parametrize("delta", [1e-4, 1e-6, 1e-9])
def test_figures_are_the_papers_formula(eps0: float, n: int, delta: float) -> None:
    g = shuffle_guarantee(eps0, n, delta=delta)
    assert g.applies == paper_condition(eps0, n, delta)
    if g.applies:
        assert g.epsilon == pytest.approx(paper_epsilon(eps0, n, delta), rel=1e-12)
        assert g.reason == ""
    else:
        assert g.epsilon is None and g.reason
    assert closed_form_epsilon(eps0, n, delta) == pytest.approx(paper_epsilon(eps0, n, delta), rel=1e-12)
    assert g.delta == delta and g.n == n and g.epsilon0 == eps0


def test_a_figure_worked_by_hand() -> None:
    """eps0 = 1, n = 10^6, delta = 10^-6: (e-1)/(e+1) = 0.462117, sqrt(e log(4e6)) = 6.428280, so
    0.462117 (8 * 6.428280 / 1000 + 8e / 10^6) = 0.023775 and eps = log(1.023775) = 0.023497;
    the condition allows eps0 up to log(10^6 / (16 log(2e6))) = log(4307.77) = 8.3682."""
    g = shuffle_guarantee(1.0, 1_000_000, delta=1e-6)
    assert g.applies and g.improves
    assert g.epsilon == pytest.approx(0.023497, abs=1e-6)
    assert g.largest_epsilon0 == pytest.approx(8.3682, abs=1e-4)


def bound(eps0: float, n: int, delta: float) -> float:
    g = shuffle_guarantee(eps0, n, delta=delta)
    assert g.applies and g.epsilon is not None, g.reason
    return g.epsilon


def test_monotone_in_n_eps0_and_delta() -> None:
    ns = [2_000, 5_000, 20_000, 10 ** 5, 10 ** 6, 10 ** 7, 10 ** 9]
    eps = [bound(1.0, n, 1e-6) for n in ns]
    assert all(a > b for a, b in zip(eps, eps[1:]))                        # more rows, smaller eps
    e0s = [0.05, 0.2, 0.5, 1.0, 2.0, 3.0, 5.0]
    by_e0 = [bound(e0, 10 ** 7, 1e-6) for e0 in e0s]
    assert all(a < b for a, b in zip(by_e0, by_e0[1:]))                    # larger eps0, larger eps
    by_delta = [bound(1.0, 10 ** 6, d) for d in (1e-3, 1e-6, 1e-9, 1e-12)]
    assert all(a < b for a, b in zip(by_delta, by_delta[1:]))              # smaller delta, larger eps
    # the order of the bound: eps * sqrt(n) settles to 8 (e^eps0-1)/(e^eps0+1) sqrt(e^eps0 log(4/delta))
    lim = 8 * math.tanh(0.5) * math.sqrt(math.e * math.log(4e6))
    big = shuffle_guarantee(1.0, 10 ** 12, delta=1e-6).epsilon
    assert big is not None and big * 10 ** 6 == pytest.approx(lim, rel=1e-4)


def test_too_few_rows_for_any_eps0() -> None:
    g = shuffle_guarantee(1.0, 200, delta=1e-6)   # 16 log(2e6) = 232.1 > 200; at eps0 1, n >= 16 e log(2e6) = 631.03
    assert not g.applies and g.epsilon is None and g.largest_epsilon0 is None and not g.improves
    assert "too few rows" in g.reason and "n >= 632" in g.reason
    assert largest_epsilon0(200, 1e-6) is None


def test_row_eps_too_large_for_n() -> None:
    g = shuffle_guarantee(10.0, 100_000, delta=1e-6)   # largest eps0 log(100000 / 232.1) = 6.07
    assert not g.applies and g.epsilon is None
    assert g.largest_epsilon0 == pytest.approx(math.log(100_000 / (16 * math.log(2e6))), rel=1e-12)
    assert "row eps too large" in g.reason and "6.066" in g.reason
    # exactly at the largest eps0 the statement applies
    top = g.largest_epsilon0
    assert top is not None and shuffle_guarantee(top, 100_000, delta=1e-6).applies
    assert not shuffle_guarantee(top * (1 + 1e-9), 100_000, delta=1e-6).applies


def test_no_gain_near_the_condition_edge_at_tiny_eps0() -> None:
    """At eps0 = 0.01 and the smallest n the condition allows, the bound is above eps0: it applies
    but does not improve on the reports' own eps0."""
    delta = 1e-6
    n = math.ceil(16 * math.log(2 / delta) * math.exp(0.01))
    g = shuffle_guarantee(0.01, n, delta=delta)
    assert g.applies and g.epsilon is not None and g.epsilon > 0.01 and not g.improves


def test_dict_and_bad_arguments() -> None:
    g = shuffle_guarantee(2.0, 50_000, delta=1e-6)
    assert isinstance(g, ShuffleGuarantee)
    assert list(g.to_dict()) == ["applies", "epsilon", "delta", "rows", "row_epsilon", "largest_row_epsilon",
                                 "improves", "reason", "source"]
    assert "Hiding Among the Clones" in g.to_dict()["source"]
    for bad in [dict(epsilon0=0.0, n=10, delta=1e-6), dict(epsilon0=math.inf, n=10, delta=1e-6),
                dict(epsilon0=1.0, n=0, delta=1e-6), dict(epsilon0=1.0, n=10.5, delta=1e-6),
                dict(epsilon0=1.0, n=10, delta=0.0), dict(epsilon0=1.0, n=10, delta=1.0),
                dict(epsilon0=True, n=10, delta=1e-6)]:
        with pytest.raises(UsageError):
            shuffle_guarantee(bad["epsilon0"], bad["n"], delta=bad["delta"])  # type: ignore[arg-type]
