"""Tests of ntrans.quantiles: exact quantiles from a spill file and histograms."""

from __future__ import annotations

import numpy as np
import pytest

import ntrans.quantiles as quantiles
from ntrans.quantiles import SourceQuantiles, SpilledQuantiles
from ntrans.translate import weighted_quantile

QS = [0.0, 0.1, 0.37, 0.5, 0.9, 1.0]


def sample(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    if kind == "spread":       # ratios around 1
        v = np.exp(rng.normal(0.0, 0.3, n))
    elif kind == "wide":       # far beyond the bins' span on both sides
        v = np.exp(rng.normal(0.0, 10.0, n))
    elif kind == "ties":       # few distinct values
        v = np.round(np.exp(rng.normal(0.0, 0.3, n)), 2)
    else:                      # all equal: every value in one bin
        v = np.full(n, 1.25)
    v[rng.random(n) < 0.05] = np.nan
    return v


@pytest.mark.parametrize("kind", ["spread", "wide", "ties", "equal"])
@pytest.mark.parametrize("n", [1, 2, 3, 50, 5000])
@pytest.mark.parametrize("weighted", [True, False])
@pytest.mark.parametrize("absolute", [False, True])
def test_spilled_quantiles_are_the_whole_arrays_quantiles(tmp_path, monkeypatch, kind, n,
                                                          weighted, absolute):
    # references: numpy.quantile's default (linear between order statistics, Hyndman and
    # Fan 1996 type 7) for plain values, the weighted mid-step ECDF (weighted_quantile)
    # for weighted ones, on the whole array at once; the spill file answers from a few
    # bins read back, added in uneven chunks and read back in small ones.  Equal to
    # round-off: 1e-12 relative (the weights before a bin are summed bin by bin, another
    # order), 1e-8 where neighbouring values differ by orders of magnitude ("wide": the
    # interpolation between them magnifies the weights' round-off)
    rng = np.random.default_rng(n)
    monkeypatch.setattr(quantiles, "READ_ROWS", 7)
    n_groups = 3
    values = sample(kind, n, rng)
    if absolute:  # signed differences around zero, binned on asinh
        values = values - 1.2
    groups = rng.integers(0, n_groups, n)
    weights = rng.random(n)
    weights[rng.random(n) < 0.1] = 0.0  # left out, like NaN values
    # weights in two parts: per value, and a factor per column given at the end
    columns = rng.integers(0, 4, n)
    factor = np.array([0.5, 2.0, 0.0, 1.0])  # column 2's values drop out
    spill = SpilledQuantiles(tmp_path / "spill", n_groups, weighted=weighted,
                             scale="asinh" if absolute else "log", unit=0.001)
    cuts = np.sort(rng.integers(0, n + 1, 3))
    for a, b in zip(np.r_[0, cuts], np.r_[cuts, n], strict=True):
        spill.add(groups[a:b], values[a:b], weights[a:b] if weighted else None,
                  columns[a:b] if weighted else None)
    got = spill.quantiles(QS, absolute=absolute, column_factor=factor if weighted else None)
    counts = spill.counts()
    added = np.isfinite(values) & ((weights > 0) if weighted else True)
    weights = weights * factor[columns]
    spill.close()
    assert not (tmp_path / "spill").exists()
    for row in range(n_groups + 1):
        sel = np.ones(n, dtype=bool) if row == n_groups else groups == row
        x = np.abs(values[sel]) if absolute else values[sel]
        if weighted:
            expected = weighted_quantile(x, weights[sel], QS)
        else:
            x = x[np.isfinite(x)]
            expected = np.quantile(x, QS) if x.size else np.full(len(QS), np.nan)
        assert counts[row] == np.count_nonzero(added[sel])  # what went to the spill
        np.testing.assert_allclose(got[row], expected, rtol=1e-8 if kind == "wide" else 1e-12,
                                   atol=0)


@pytest.mark.parametrize("kind", ["spread", "ties", "equal"])
@pytest.mark.parametrize("weighted", [True, False])
def test_source_quantiles_read_twice_are_the_whole_arrays_quantiles(kind, weighted):
    # the same references as the spill file's (numpy.quantile, the weighted mid-step
    # ECDF), from values a source gives again on every pass, in chunks of 37
    rng = np.random.default_rng(7)
    n, n_groups = 3000, 4
    values = sample(kind, n, rng)
    groups = rng.integers(0, n_groups, n)
    weights = rng.random(n)
    weights[rng.random(n) < 0.1] = 0.0
    passes = []

    def read():
        passes.append(1)
        for a in range(0, n, 37):
            yield groups[a:a + 37], values[a:a + 37], weights[a:a + 37] if weighted else None

    source = SourceQuantiles(read, n_groups, weighted=weighted)
    got = source.quantiles(QS)
    assert len(passes) == 2  # histograms, then the values of the deciding bins
    kept = np.isfinite(values) & ((weights > 0) if weighted else True)
    for row in range(n_groups + 1):
        sel = kept & ((groups == row) if row < n_groups else True)
        expected = (weighted_quantile(values[sel], weights[sel], QS) if weighted
                    else np.quantile(values[sel], QS))
        np.testing.assert_allclose(got[row], expected, rtol=1e-12, atol=0)
        assert source.last_counts[row] == np.count_nonzero(sel)
    np.testing.assert_array_equal(source.counts(), source.last_counts)


@pytest.mark.parametrize("kind", ["spread", "ties", "equal"])
@pytest.mark.parametrize("q", [0.0, 0.25, 0.5, 0.9, 1.0])
def test_lower_weighted_quantile_is_the_first_value_reaching_q(tmp_path, kind, q):
    # definition: the smallest value whose cumulative weight, values ascending, reaches
    # q x the total (the lower weighted quantile); ties of the cumulative weight with q x
    # total are avoided by random weights, so round-off cannot move the answer
    rng = np.random.default_rng(11)
    n = 4000
    values = sample(kind, n, rng)
    weights = rng.random(n)
    with SpilledQuantiles(tmp_path / "spill", 1) as spill:
        spill.add(np.zeros(n, dtype=int), values, weights)
        got = spill.quantiles([q], lower=True)[0, 0]
    keep = np.isfinite(values)
    v, w = values[keep], weights[keep]
    order = np.argsort(v, kind="stable")
    cum = np.cumsum(w[order])
    at = min(int(np.searchsorted(cum, q * cum[-1], side="left")), v.size - 1)
    assert got == v[order][at]


def test_lower_quantile_needs_weights(tmp_path):
    with SpilledQuantiles(tmp_path / "spill", 1, weighted=False) as spill, \
            pytest.raises(ValueError, match="weighted"):
        spill.add(np.zeros(3, dtype=int), np.ones(3))
        spill.quantiles([0.5], lower=True)


def test_spilled_quantiles_read_back_only_a_few_bins(tmp_path, monkeypatch):
    # what makes the memory bounded: the values read back are those of the bins around
    # each quantile, not all of them
    rng = np.random.default_rng(0)
    seen = []
    original = quantiles._answer

    def spy(values, *args, **kwargs):
        seen.append(values.size)
        return original(values, *args, **kwargs)

    monkeypatch.setattr(quantiles, "_answer", spy)
    with SpilledQuantiles(tmp_path / "spill", 1) as spill:
        v = np.exp(rng.normal(0.0, 0.3, 200_000))
        spill.add(np.zeros(v.size, dtype=int), v, rng.random(v.size))
        spill.quantiles([0.1, 0.5, 0.9])
    assert len(seen) == 6 and max(seen) < 2_000  # per group and for all together


def test_spilled_quantiles_reject_unknown_groups(tmp_path):
    with SpilledQuantiles(tmp_path / "spill", 2, weighted=False) as spill, \
            pytest.raises(ValueError, match="groups"):
        spill.add(np.array([2]), np.array([1.0]))
