"""Creep campaign values: creep strain since load-on, streaming creep rate, tertiary onset.

Pure math plus one small streaming estimator (:class:`CreepRate`) that keeps bounded state
between blocks; no I/O.

Creep rate
----------
The rate is the least-squares slope of value against time over a sliding window, in value unit
per hour (microstrain per hour for a strain channel). To keep memory bounded for windows of
days at high sample rates, time is cut into bins of fixed duration ``bin_s`` aligned to the
epoch (bin index ``k = t_ns // bin_ns``), and each bin keeps only the sums
n, sum u, sum y, sum u^2, sum u y (u = time since the bin start, y = value minus the first
usable value). The window of a sample in bin k is exactly

    the usable samples of bins k - N + 1 .. k up to and including that sample

with N = ``window_s / bin_s`` (a whole number), so its length lies between (N - 1) bin_s and
N bin_s. The slope over that sample set is the exact least-squares slope (the same as
numpy.polyfit of degree 1 over those samples); because bins are aligned to absolute time,
the result does not depend on how the samples are split into blocks.

Usable samples: finite values. NaN values are left out of every sum, and the rate reported at
a NaN sample is NaN (a derived value exists only where the measured one does). A rate is also
NaN until the window holds at least ``min_samples`` usable samples whose time spread is large
enough: the effective span sqrt(12 var(t)) (equal to the span for evenly spaced samples) must
reach ``min_span_s`` (default half the window), so a barely started window gives no rate.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "SECONDS_PER_HOUR",
    "creep_strain",
    "CreepRate",
    "tertiary_onset",
]

SECONDS_PER_HOUR = 3600.0
_NS = 1_000_000_000


def creep_strain(values: np.ndarray | float, reference_value: float) -> np.ndarray:
    """Creep strain since load-on: values - reference_value (same unit, e.g. microstrain).

    ``reference_value`` is the reading just after the load was applied; it is an explicit input
    so the zero of a campaign is never re-taken silently.
    """
    ref = float(reference_value)
    if not math.isfinite(ref):
        raise ValueError(f"reference_value: expected a finite value, got {reference_value!r}")
    return np.asarray(values, dtype=np.float64) - ref


def _shift(s: np.ndarray, d: np.ndarray | float) -> np.ndarray:
    """Re-reference time sums (rows n, St, Sy, Stt, Sty) from origin r to origin r - d."""
    n, st, sy, stt, sty = s
    return np.stack([n, st + n * d, sy, stt + 2.0 * d * st + n * d * d, sty + d * sy])


class CreepRate:
    """Streaming least-squares slope over a sliding time window (value unit per hour).

    window_s:    window length (s); a whole number of bins.
    bin_s:       bin duration (s); default window_s / 100 (window length then within 1 %).
    min_samples: usable samples needed in the window for a rate (>= 2).
    min_span_s:  effective time span needed (s); default window_s / 2.

    Feed blocks in time order with :meth:`update`; it returns one rate per sample. The cost of a
    block is O(n + N) numpy work (N bins per window), and the state is O(N).
    """

    def __init__(
        self,
        window_s: float,
        bin_s: float | None = None,
        min_samples: int = 3,
        min_span_s: float | None = None,
    ) -> None:
        w = float(window_s)
        if not (math.isfinite(w) and w > 0.0):
            raise ValueError(f"window_s: expected a positive duration, got {window_s!r}")
        b = w / 100.0 if bin_s is None else float(bin_s)
        if not (math.isfinite(b) and b > 0.0):
            raise ValueError(f"bin_s: expected a positive duration, got {bin_s!r}")
        nb = int(round(w / b))
        if nb < 2 or abs(nb * b - w) > 1e-9 * w:
            raise ValueError(
                f"window_s: expected a whole number (>= 2) of bins of {b:g} s, got {w:g} s"
            )
        bin_ns = int(round(b * _NS))
        if bin_ns < 1:
            raise ValueError(f"bin_s: {b!r} s is shorter than 1 ns")
        if isinstance(min_samples, bool) or not isinstance(min_samples, int) or min_samples < 2:
            raise ValueError(f"min_samples: expected an integer >= 2, got {min_samples!r}")
        span = 0.5 * w if min_span_s is None else float(min_span_s)
        if not (math.isfinite(span) and span >= 0.0):
            raise ValueError(f"min_span_s: expected a duration >= 0, got {min_span_s!r}")
        self.window_s = w
        self.window_bins = nb
        self.bin_ns = bin_ns
        self.bin_s = bin_ns / _NS
        self.min_samples = min_samples
        self.min_span_s = span
        self.reset()

    def reset(self) -> None:
        """Forget all samples (e.g. at a new load step)."""
        self._y_ref: float | None = None
        self._last_t_ns: int | None = None
        self._open_k: int | None = None
        self._open = np.zeros(5)
        self._tab = np.zeros((5, self.window_bins - 1))
        self._tab_base = -(1 << 62)  # table covers bins [base, base + N - 1); empty at start

    # -- table of complete bins (the last N - 1 bins before the open one)
    def _append(self, bins: np.ndarray, stats: np.ndarray) -> None:
        n_tab = self.window_bins - 1
        new_lo = int(bins[-1]) + 1 - n_tab
        tab = np.zeros((5, n_tab))
        a = max(self._tab_base, new_lo)
        b = min(self._tab_base, new_lo) + n_tab
        if a < b:
            tab[:, a - new_lo:b - new_lo] = self._tab[:, a - self._tab_base:b - self._tab_base]
        sel = bins >= new_lo
        tab[:, bins[sel] - new_lo] = stats[:, sel]
        self._tab = tab
        self._tab_base = new_lo

    def _fill(self, out: np.ndarray, lo: int, hi: int) -> None:
        a = max(self._tab_base, lo)
        b = min(self._tab_base + self.window_bins - 1, hi)
        if a < b:
            out[:, a - lo:b - lo] = self._tab[:, a - self._tab_base:b - self._tab_base]

    def _rate_per_s(self, tot: np.ndarray) -> np.ndarray:
        n, st, sy, stt, sty = tot
        den = n * stt - st * st            # n^2 var(t)
        num = n * sty - st * sy            # n^2 cov(t, y)
        with np.errstate(divide="ignore", invalid="ignore"):
            span = np.sqrt(12.0 * np.maximum(den, 0.0)) / n
            slope = num / den
        ok = (n >= self.min_samples) & (den > 0.0) & (span >= self.min_span_s)
        return np.where(ok, slope, np.nan)

    def update(self, times_ns: np.ndarray, values: np.ndarray) -> np.ndarray:
        """Add a block; returns the rate (value unit per hour) at each of its samples.

        times_ns: (n,) integer sample times (ns, non-decreasing, also across blocks).
        values:   (n,) values; NaN marks an unusable sample.
        """
        t = np.asarray(times_ns)
        y = np.asarray(values, dtype=np.float64)
        if t.ndim != 1 or y.shape != t.shape:
            raise ValueError(f"times_ns, values: expected equal 1-d shapes, got {t.shape}, {y.shape}")
        if t.size and not np.issubdtype(t.dtype, np.integer):
            raise ValueError(f"times_ns: expected integer nanoseconds, got dtype {t.dtype}")
        n = t.size
        if n == 0:
            return np.empty(0)
        t = t.astype(np.int64)
        if np.any(t[1:] < t[:-1]) or (self._last_t_ns is not None and t[0] < self._last_t_ns):
            raise ValueError("times_ns: sample times must not decrease")
        valid = np.isfinite(y)
        if self._y_ref is None and valid.any():
            self._y_ref = float(y[np.argmax(valid)])
        y_ref = 0.0 if self._y_ref is None else self._y_ref

        nb, bin_ns, bin_s = self.window_bins, self.bin_ns, self.bin_s
        k = t // bin_ns
        u = (t - k * bin_ns).astype(np.float64) / _NS
        w = valid.astype(np.float64)
        v = np.where(valid, y - y_ref, 0.0)
        uw = u * w
        contrib = np.stack([w, uw, v, uw * u, u * v])

        first = np.empty(n, dtype=bool)
        first[0] = True
        first[1:] = k[1:] != k[:-1]
        starts = np.flatnonzero(first)
        ends = np.append(starts[1:] - 1, n - 1)
        gid = np.cumsum(first) - 1
        cs = np.cumsum(contrib, axis=1)
        base = np.zeros((5, starts.size))
        base[:, 1:] = cs[:, starts[1:] - 1]
        within = cs - base[:, gid]              # sums of each bin up to and including a sample
        kb = k[starts]
        if self._open_k is not None:
            if kb[0] == self._open_k:
                within[:, : ends[0] + 1] += self._open[:, None]
            else:
                self._append(np.array([self._open_k]), self._open[:, None])
        tot = within[:, ends]                   # each bin's sums at the end of this block
        n_groups = starts.size

        out = np.empty(n)
        ga = 0
        while ga < n_groups:
            # A chunk of bins spanning fewer than N bins: short prefix sums, small time offsets.
            gb = int(np.searchsorted(kb, kb[ga] + nb, side="left")) - 1
            k0 = int(kb[ga])
            lo, hi = k0 - nb + 1, int(kb[gb])
            full = np.zeros((5, hi - lo))
            self._fill(full, lo, hi)
            full[:, kb[ga:gb] - lo] = tot[:, ga:gb]
            d = (np.arange(hi - lo) + (lo - k0)) * bin_s
            pref = np.zeros((5, hi - lo + 1))
            np.cumsum(_shift(full, d), axis=1, out=pref[:, 1:])
            s0, s1 = starts[ga], ends[gb] + 1
            kk = kb[gid[s0:s1]]
            c_end = kk - lo
            win = pref[:, c_end] - pref[:, c_end - (nb - 1)]
            part = _shift(within[:, s0:s1], (kk - k0) * bin_s)
            out[s0:s1] = self._rate_per_s(win + part)
            g_last = gb if gb < n_groups - 1 else gb - 1
            if g_last >= ga:
                self._append(kb[ga:g_last + 1], tot[:, ga:g_last + 1])
            ga = gb + 1

        self._open_k = int(kb[-1])
        self._open = tot[:, -1].copy()
        self._last_t_ns = int(t[-1])
        out[~valid] = np.nan
        return out * SECONDS_PER_HOUR


def _range_max(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """max(x[lo:hi]) for each pair (-inf for an empty range), by a sparse table (O(n log n))."""
    n = x.size
    levels = [x]
    width = 1
    while 2 * width <= n:
        prev = levels[-1]
        levels.append(np.maximum(prev[:-width], prev[width:]))
        width *= 2
    length = hi - lo
    out = np.full(lo.shape, -np.inf)
    nz = length > 0
    if nz.any():
        k = np.floor(np.log2(length[nz])).astype(np.int64)
        lo_nz, hi_nz = lo[nz], hi[nz]
        res = np.empty(k.size)
        for lev in np.unique(k):
            sel = k == lev
            tab = levels[lev]
            res[sel] = np.maximum(tab[lo_nz[sel]], tab[hi_nz[sel] - (1 << lev)])
        out[nz] = res
    return out


def tertiary_onset(
    times_ns: np.ndarray,
    rate_per_h: np.ndarray,
    rise_factor: float = 1.5,
    min_steady_s: float = 0.0,
    hold_s: float = 0.0,
) -> int | None:
    """Index where tertiary creep starts in a creep-rate series, or None.

    Rule (NaN rates are skipped throughout): m(t) is the running minimum of the rate, the
    minimum creep rate so far, last lowered at time a(t). A *rise* starts at a sample where
    rate >= rise_factor * m > 0 while the previous usable sample was below its own trigger
    level. It marks the onset when

    * the minimum came from a steady stretch: over the ``min_steady_s`` before a, every rate
      stayed below rise_factor * m, and the series reaches back that far; and
    * rate >= rise_factor * m holds on every sample from the rise until at least ``hold_s``
      later (so a noisy excursion does not count; the onset is the start of the run that lasts).

    The first such rise is returned (index into the input). Rates are expected positive
    (tension creep); negate a compression series first.
    """
    t = np.asarray(times_ns)
    r = np.asarray(rate_per_h, dtype=np.float64)
    if t.ndim != 1 or r.shape != t.shape:
        raise ValueError(f"times_ns, rate_per_h: expected equal 1-d shapes, got {t.shape}, {r.shape}")
    f = float(rise_factor)
    if not (math.isfinite(f) and f > 1.0):
        raise ValueError(f"rise_factor: expected a factor > 1, got {rise_factor!r}")
    for name, val in (("min_steady_s", min_steady_s), ("hold_s", hold_s)):
        if not (math.isfinite(float(val)) and float(val) >= 0.0):
            raise ValueError(f"{name}: expected a duration >= 0, got {val!r}")
    idx = np.flatnonzero(np.isfinite(r))
    if idx.size == 0:
        return None
    tv = t[idx].astype(np.int64)
    rv = r[idx]
    if np.any(tv[1:] < tv[:-1]):
        raise ValueError("times_ns: sample times must not decrease")
    m = np.minimum.accumulate(rv)
    level = f * m
    trig = (m > 0.0) & (rv >= level)
    if not trig.any():
        return None
    rise = trig.copy()
    rise[1:] &= ~trig[:-1]
    starts = np.flatnonzero(rise)
    # steady stretch before the time the minimum in force at each rise was reached
    arg_min = np.maximum.accumulate(np.where(rv <= m, np.arange(rv.size), 0))
    a_idx = arg_min[starts]
    steady_ns = int(round(float(min_steady_s) * _NS))
    lo = np.searchsorted(tv, tv[a_idx] - steady_ns, side="left")
    prior_max = _range_max(rv, lo, a_idx)
    steady = (prior_max < level[starts]) & (tv[a_idx] - steady_ns >= tv[0])
    # persistence: the run of trig samples from each rise lasts hold_s
    run_id = np.cumsum(rise) - 1
    last_t = np.full(starts.size, np.iinfo(np.int64).min)
    np.maximum.at(last_t, run_id[trig], tv[trig])
    held = last_t - tv[starts] >= int(round(float(hold_s) * _NS))
    good = np.flatnonzero(steady & held)
    if good.size == 0:
        return None
    return int(idx[starts[good[0]]])
