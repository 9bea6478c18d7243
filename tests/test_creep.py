"""Creep rate (streaming least-squares slope), creep strain and tertiary onset.

Oracle: numpy.polyfit of degree 1 over exactly the window the module documents (the usable
samples of bins k - N + 1 .. k up to the sample), computed per sample in this file.
"""

from __future__ import annotations

import numpy as np
import pytest

from straind.creep import CreepRate, _range_max, creep_strain, tertiary_onset

T0_NS = 1_700_000_000 * 10**9          # epoch-like start: exercises int64 arithmetic
NS = 10**9


def oracle_rate_per_h(t_ns, y, bin_ns, n_bins, min_samples, min_span_s, j):
    """polyfit slope (per hour) of the documented window of sample j, or NaN."""
    if not np.isfinite(y[j]):
        return np.nan
    k = t_ns // bin_ns
    idx = np.arange(t_ns.size)
    sel = np.isfinite(y) & (k >= k[j] - n_bins + 1) & (k <= k[j]) & (idx <= j)
    if sel.sum() < min_samples:
        return np.nan
    tt = (t_ns[sel] - t_ns[j]) / 1e9
    if np.sqrt(12.0 * np.var(tt)) < min_span_s or np.var(tt) == 0:
        return np.nan
    return np.polyfit(tt, y[sel], 1)[0] * 3600.0


def feed(cr: CreepRate, t_ns, y, sizes) -> np.ndarray:
    out, pos = [], 0
    for s in sizes:
        out.append(cr.update(t_ns[pos:pos + s], y[pos:pos + s]))
        pos += s
    assert pos == t_ns.size
    return np.concatenate(out)


def random_sizes(rng, n, hi):
    sizes = []
    while sum(sizes) < n:
        sizes.append(int(rng.integers(0, hi)))
    sizes[-1] -= sum(sizes) - n
    return sizes


def irregular_signal(seed=1):
    """~4 h at about 1 S/s with jitter, a 3 h gap inside, 5 % NaN; slope 3 ue/h plus ripple."""
    rng = np.random.default_rng(seed)
    base = np.arange(0, 4 * 3600, dtype=np.int64) * NS
    base = np.concatenate([base[:7000], base[7000:] + 3 * 3600 * NS])
    jitter = rng.integers(-300_000_000, 300_000_000, base.size)
    t_ns = np.sort(T0_NS + base + jitter)
    t_h = (t_ns - T0_NS) / 3.6e12
    y = 1000.0 + 3.0 * t_h + 0.8 * np.sin(t_h * 5.0) + 0.2 * rng.standard_normal(t_ns.size)
    y[rng.random(t_ns.size) < 0.05] = np.nan
    return t_ns, y


def test_rate_equals_polyfit_over_documented_window():
    t_ns, y = irregular_signal()
    cr = CreepRate(window_s=1800.0, bin_s=60.0, min_samples=3, min_span_s=300.0)
    rng = np.random.default_rng(2)
    got = feed(cr, t_ns, y, random_sizes(rng, t_ns.size, 900))
    check = np.unique(np.concatenate([np.arange(0, 400), rng.integers(0, t_ns.size, 600),
                                      np.arange(6990, 7400)]))
    want = np.array([oracle_rate_per_h(t_ns, y, cr.bin_ns, cr.window_bins, 3, 300.0, j) for j in check])
    # numpy.polyfit over the same samples
    np.testing.assert_array_equal(np.isnan(got[check]), np.isnan(want))
    ok = ~np.isnan(want)
    assert ok.sum() > 600
    np.testing.assert_allclose(got[check][ok], want[ok], rtol=1e-8, atol=1e-9)


def test_block_split_does_not_change_result():
    t_ns, y = irregular_signal(seed=4)
    rng = np.random.default_rng(9)

    def run(sizes):
        return feed(CreepRate(window_s=1200.0, bin_s=30.0), t_ns, y, sizes)

    whole = run([t_ns.size])
    parts = run(random_sizes(rng, t_ns.size, 3000))
    tiny = run([1] * 3000 + [t_ns.size - 3000])
    for other in (parts, tiny):
        np.testing.assert_array_equal(np.isnan(whole), np.isnan(other))
        m = ~np.isnan(whole)
        np.testing.assert_allclose(other[m], whole[m], rtol=1e-9, atol=1e-10)
    assert (~np.isnan(whole)).sum() > 5000


def test_secondary_creep_slope_recovered_within_one_percent():
    # ASTM E139 / ISO 204 creep curve shape: primary stage (decaying rate) then a steady
    # secondary stage; simulated 36 h at 10 S/s, 0.5 ue noise, secondary slope 2.5 ue/h
    rng = np.random.default_rng(12)
    rate_true = 2.5
    n = 36 * 3600 * 10
    t_ns = T0_NS + np.arange(n, dtype=np.int64) * 100_000_000
    t_h = np.arange(n) / 36000.0
    y = 1500.0 + 60.0 * (1 - np.exp(-t_h / 2.0)) + rate_true * t_h + 0.5 * rng.standard_normal(n)
    cr = CreepRate(window_s=3 * 3600.0)
    out = feed(cr, t_ns, y, [36000] * 36)
    late = out[t_h > 20.0]
    assert not np.isnan(late).any()
    assert np.max(np.abs(late - rate_true)) < 0.01 * rate_true
    # in the primary stage the measured rate is well above the secondary rate
    early = out[(t_h > 2.0) & (t_h < 3.0)]
    assert np.nanmin(early) > 5.0
    # memory stays bounded: N - 1 stored bins whatever the campaign length
    assert cr._tab.shape == (5, cr.window_bins - 1)


def test_rate_needs_enough_span_and_samples():
    # evenly spaced samples at 1 S/s: effective span sqrt(12 var) = sqrt(n^2 - 1) s
    t_ns = T0_NS + np.arange(400, dtype=np.int64) * NS
    y = 2.0 * np.arange(400) / 3600.0                          # 2 units per hour
    out = CreepRate(window_s=600.0, bin_s=6.0, min_span_s=100.0).update(t_ns, y)
    first = int(np.flatnonzero(~np.isnan(out))[0])
    assert first == 100                                       # n = 101 samples, span 100.005 s
    np.testing.assert_allclose(out[first:], 2.0, rtol=1e-9)
    out2 = CreepRate(window_s=600.0, bin_s=6.0, min_samples=5, min_span_s=0.0).update(t_ns, y)
    assert np.isnan(out2[:4]).all() and not np.isnan(out2[4:]).any()


def test_nan_samples_report_nan_and_are_excluded():
    t_ns = T0_NS + np.arange(200, dtype=np.int64) * NS
    y = np.arange(200, dtype=float)                            # 3600 units per hour
    y[50:60] = np.nan
    spoiled = y.copy()
    out = CreepRate(window_s=100.0, bin_s=10.0, min_span_s=0.0).update(t_ns, y)
    assert np.isnan(out[50:60]).all()
    np.testing.assert_allclose(out[2:50], 3600.0, rtol=1e-10)
    np.testing.assert_allclose(out[60:], 3600.0, rtol=1e-10)
    assert np.array_equal(np.isnan(spoiled), np.isnan(y))     # input untouched


def test_input_validation():
    cr = CreepRate(window_s=100.0, bin_s=10.0)
    cr.update(np.array([5 * NS, 6 * NS]), np.array([1.0, 2.0]))
    with pytest.raises(ValueError):
        cr.update(np.array([4 * NS]), np.array([1.0]))         # time going back across blocks
    with pytest.raises(ValueError):
        cr.update(np.array([9 * NS, 8 * NS]), np.array([1.0, 2.0]))
    with pytest.raises(ValueError):
        cr.update(np.array([1.5, 2.5]), np.array([1.0, 2.0]))  # float times
    with pytest.raises(ValueError):
        cr.update(np.array([10 * NS]), np.array([1.0, 2.0]))
    assert cr.update(np.array([], dtype=np.int64), np.array([])).shape == (0,)
    with pytest.raises(ValueError):
        CreepRate(window_s=100.0, bin_s=30.0)                  # not a whole number of bins
    with pytest.raises(ValueError):
        CreepRate(window_s=-1.0)
    with pytest.raises(ValueError):
        CreepRate(window_s=100.0, min_samples=1)
    cr.reset()
    cr.update(np.array([1 * NS]), np.array([0.0]))             # after reset time may restart


def test_creep_strain():
    np.testing.assert_allclose(creep_strain(np.array([1000.0, 1012.5]), 1000.0), [0.0, 12.5])
    with pytest.raises(ValueError):
        creep_strain(np.array([1.0]), float("nan"))


# --------------------------------------------------------------------------- tertiary onset

def _three_stage_rate(t_h):
    """Creep rate (ue/h): primary decay to 1.0, steady 1.0, tertiary growth from 30 h."""
    primary = 1.0 + 9.0 * np.exp(-t_h / 2.0) * (t_h < 12.0)
    tertiary = np.where(t_h > 30.0, np.exp((t_h - 30.0) / 4.0) - 1.0, 0.0)
    return np.where(t_h < 12.0, primary, 1.0) + tertiary


def test_tertiary_onset_noiseless():
    t_h = np.arange(0, 45, 0.01)
    t_ns = T0_NS + np.round(t_h * 3.6e12).astype(np.int64)
    rate = _three_stage_rate(t_h)
    i = tertiary_onset(t_ns, rate, rise_factor=1.5, min_steady_s=3 * 3600.0)
    # steady minimum 1.0 (reached at 12 h): onset where exp((t - 30)/4) = 1.5, t = 30 + 4 ln 1.5
    expected = 30.0 + 4.0 * np.log(1.5)
    assert t_h[i] >= expected and t_h[i] - expected < 0.011


def test_tertiary_onset_with_noise_and_hold():
    rng = np.random.default_rng(8)
    t_h = np.arange(0, 45, 0.01)
    t_ns = T0_NS + np.round(t_h * 3.6e12).astype(np.int64)
    rate = _three_stage_rate(t_h) * (1 + 0.04 * rng.standard_normal(t_h.size))
    rate[rng.random(t_h.size) < 0.02] = np.nan
    i = tertiary_onset(t_ns, rate, rise_factor=1.5, min_steady_s=3 * 3600.0, hold_s=1800.0)
    # the noisy minimum m sits ~12 % below 1.0; the noiseless curve crosses 1.5 m at
    # 30 + 4 ln(1.5 m) h, and the run that lasts 30 min starts a little after that
    m = np.nanmin(rate)
    crossing = 30.0 + 4.0 * np.log(1.5 * m)
    assert crossing - 0.3 < t_h[i] < crossing + 0.6
    assert np.isfinite(rate[i])
    # without the hold a noisy excursion before the crossing already counts
    j = tertiary_onset(t_ns, rate, rise_factor=1.5, min_steady_s=3 * 3600.0, hold_s=0.0)
    assert t_h[j] < t_h[i]
    # a steady noisy series alone never triggers
    steady = 1.0 + 0.04 * rng.standard_normal(t_h.size)
    assert tertiary_onset(t_ns, steady, rise_factor=1.5, hold_s=1800.0) is None


def test_tertiary_onset_needs_a_steady_stretch():
    t_h = np.arange(0, 20, 0.01)
    t_ns = T0_NS + np.round(t_h * 3.6e12).astype(np.int64)
    v_shape = 1.0 + np.abs(t_h - 10.0)                 # minimum at 10 h, rising at once
    assert tertiary_onset(t_ns, v_shape, rise_factor=1.5, min_steady_s=3600.0) is None
    i = tertiary_onset(t_ns, v_shape, rise_factor=1.5, min_steady_s=0.0)
    assert t_h[i] == pytest.approx(10.5, abs=0.011)
    assert tertiary_onset(t_ns, np.full(t_h.size, np.nan)) is None
    with pytest.raises(ValueError):
        tertiary_onset(t_ns, v_shape, rise_factor=1.0)


def test_range_max_against_python_max():
    # brute force max() over each slice (Python builtin) as the oracle of the sparse table
    rng = np.random.default_rng(3)
    for n in (1, 2, 7, 64, 1000):
        x = rng.standard_normal(n)
        lo = rng.integers(0, n + 1, 300)
        hi = np.minimum(n, lo + rng.integers(0, n + 1, 300))
        got = _range_max(x, lo, hi)
        want = [max(x[a:b]) if b > a else -np.inf for a, b in zip(lo, hi)]
        np.testing.assert_array_equal(got, want)
