"""Conformance of the per-row hook (``Mechanism.per_row_columns`` / ``per_row_values`` /
``per_row_note``, mechanisms/base.py), on every registered mechanism and on the composites the
release builds (a value with a missing flag, a second randomization layer).

The promise of the partner's reader (ldptransform/perrow.py): the mean of each per-row column over
the reporting rows equals the point estimate of the mechanism's own decoder to floating-point
precision (relative 1e-9, absolute 1e-12: the decoder adds the same values, in another order or
from counts), and a mechanism without per-row unbiased estimates says so and gives no column.
The per-row values of a value with a missing flag are also checked for unbiasedness by Monte Carlo
(within 5 SE).  Randomness: the suite's fixed keyed words (``release`` of test_conformance.py).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from test_conformance import MC_SE, NAMES, decode, example, release, skewed_input

from ldptransform.mechanisms import Mechanism, with_missing_flag
from ldptransform.mechanisms.decoders import (DistributionDecoder, FrequencyDecoder, MeanDecoder,
                                              MissingAnswerDecoder, MissingDistributionDecoder)

ROWS = 20_000
RTOL, ATOL = 1e-9, 1e-12
MISSING_SHARE = 0.3

COMPOSITES: dict[str, Callable[[], Mechanism]] = {
    "two-point + missing flag": lambda: with_missing_flag(example("two-point"), 0.5),
    "hybrid + missing flag": lambda: with_missing_flag(example("hybrid"), 0.7),
    "hierarchy + missing flag": lambda: with_missing_flag(example("hierarchy"), 0.5),
    "grr, second layer": lambda: example("grr").with_second_layer(1.5),
    "two-point, second layer": lambda: example("two-point").with_second_layer(2.0),
}


def _inputs(m: Mechanism, seed: int) -> np.ndarray:
    if "missing_answer" not in m.to_spec():
        return skewed_input(m, ROWS, seed)
    x = skewed_input(m.value, ROWS, seed)  # type: ignore[attr-defined]
    x[np.random.default_rng(seed + 1).random(ROWS) < MISSING_SHARE] = np.nan
    return x


def _check(m: Mechanism, label: str) -> None:
    x = _inputs(m, 11)
    arrays = release(m, x, f"per-row/{label}")
    cols = m.per_row_columns("col")
    names = [c.name for c in cols]
    assert len(set(names)) == len(names) and all(n.startswith("col") for n in names)
    assert all(c.meaning for c in cols)
    dec = decode(m, arrays)
    if not cols:
        note = m.per_row_note("col")
        assert dec.family in ("distribution", "quantile") and note.startswith("col: ") and m.per_row_reason in note
        with pytest.raises(NotImplementedError):
            m.per_row_values(arrays)
        return
    vals = m.per_row_values(arrays)
    assert vals.shape == (ROWS, len(cols)) and vals.dtype == np.float64 and np.isfinite(vals).all()
    means = vals.mean(axis=0)
    if isinstance(dec, FrequencyDecoder):
        est, _ = dec.estimates()
        assert est is not None
        np.testing.assert_allclose(means, est, rtol=RTOL, atol=ATOL)
        assert names == [f"col={c}" for c in m.categories]  # type: ignore[attr-defined]
        assert m.per_row_note("col") == ""
    elif isinstance(dec, MissingAnswerDecoder):
        share = dec.missing_share(1.96)
        assert means[0] == pytest.approx(share.estimate, rel=RTOL, abs=ATOL)
        mean = dec.mean(1.96).estimate
        assert means[1] / (1.0 - means[0]) == pytest.approx(mean, rel=RTOL, abs=ATOL)
        assert names == ["col=<missing>", "col*present"] and m.per_row_note("col") == ""
        _unbiased(x, vals)
    elif isinstance(dec, MissingDistributionDecoder):
        share = dec.missing_share(1.96)
        assert means[0] == pytest.approx(share.estimate, rel=RTOL, abs=ATOL)
        assert names == ["col=<missing>"]
        assert "values are left out" in m.per_row_note("col")
        _unbiased(x, vals)
    else:
        assert isinstance(dec, MeanDecoder) and not isinstance(dec, DistributionDecoder)
        assert means[0] == pytest.approx(dec.mean(1.96).estimate, rel=RTOL, abs=ATOL)
        assert names == ["col"] and m.per_row_note("col") == ""


def _unbiased(x: np.ndarray, vals: np.ndarray) -> None:
    """Monte Carlo: each per-row column's mean within MC_SE standard errors of its true mean (the
    share missing; the value times the present indicator)."""
    missing = np.isnan(x)
    truth = [missing.mean(), np.where(missing, 0.0, x).mean()][: vals.shape[1]]
    for j, t in enumerate(truth):
        se = vals[:, j].std(ddof=1) / np.sqrt(len(x))
        assert abs(vals[:, j].mean() - t) <= MC_SE * se, (j, vals[:, j].mean(), t, se)


@pytest.mark.parametrize("name", NAMES)
def test_per_row_means_are_the_decoders_point_estimates(name: str) -> None:
    _check(example(name), name)


@pytest.mark.parametrize("name", sorted(COMPOSITES))
def test_per_row_means_of_composites(name: str) -> None:
    _check(COMPOSITES[name](), name)


@pytest.mark.parametrize("name", NAMES)
def test_per_row_values_are_what_the_decoders_add(name: str) -> None:
    """The per-row values are the family's own per-row estimates: the frequency oracles'
    ``row_estimates`` (whose sums ``decode_sums`` gives from counts), a mean mechanism's written value."""
    m = example(name)
    arrays = release(m, skewed_input(m, 500, 5), f"per-row-values/{name}")
    if m.family == "frequency":
        np.testing.assert_array_equal(m.per_row_values(arrays), m.row_estimates(arrays))  # type: ignore[attr-defined]
    elif m.family == "mean":
        want = np.asarray(arrays[0].cast("double").to_numpy(zero_copy_only=False))
        np.testing.assert_array_equal(m.per_row_values(arrays)[:, 0], want)
    else:
        assert m.per_row_columns("col") == [] and m.per_row_reason
