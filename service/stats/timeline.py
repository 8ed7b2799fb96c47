"""Evidence that a detector's counts depart from its baseline: the timeline scorer.

Pure numpy/scipy: no web or database imports. Counts are vehicles per interval; times are epoch
seconds (UTC) and ``interval_s`` seconds; probabilities are natural logarithms (``log_p``) unless a
name says ``surprise`` (``-log10 p``).

The predictive model
--------------------
The baseline gives, for every interval, ``mu`` (expected vehicles), ``log_se`` (standard error of
``log mu``), ``day_alpha`` (variance of a gamma day factor with mean 1) and ``interval_alpha``
(negative binomial alpha of the interval-level excess). A count is Poisson given its rate
``mu * D * B * H``: ``D`` today's level, ``B`` the baseline's own error (lognormal, variance
``exp(log_se**2) - 1``), ``H`` the interval factor. Because ``D`` makes a busy day busy all
morning, intervals are not independent. The scorer therefore learns ``D`` online: a Poisson-gamma
conjugate posterior from the detector's recent intervals of the same local day (the last hour,
stretched back up to 6 h while it holds under 60 vehicles' worth of information), prior
Gamma with relative variance ``v0 = day_alpha + exp(log_se**2) - 1 + interval_alpha`` (today's
level takes in the baseline's own error and the hour-scale swings, which consecutive intervals
share), each interval weighted by ``1 / (1 + interval_alpha mu)`` (its information about the
level relative to a Poisson count; quasi-likelihood weighting), down-weighting to a quarter
every interval already flagged and, once a flag is raised, the 30 minutes before it (the onset
of a shift, scored before its alarm, is learned only slowly as today's level; dropped outright,
a false alarm on a quiet detector could sustain itself all day). The local day bounds the
window because ``D`` is a day factor; ``score_timeline`` takes the local day of each interval for that. Each interval is then judged
against the posterior predictive negative binomial: mean
``mu * a/b`` and alpha ``(1 + 1/a) (1 + interval_alpha) - 1`` (the relative variances of
independent mean-one factors multiply; the product is moment-matched to one gamma).
By the prequential (sequential predictive) factorisation the product of these predictives is the
joint probability of the sequence, so sequential tests on them need no independence assumption.

Tests and their families
------------------------
``zero_counts``
    a run of zero counts; probability of the whole run, ``exp(-sum lambda)`` for Poisson and the
    moment-matched gamma mixture ``(1 + Var/M)^(-M^2/Var)`` otherwise, judged against the level
    posterior as it stood when the run began.
``low_volume`` / ``high_volume``
    single-interval tail probabilities (lower tail for counts of at least one; zeros belong to
    ``zero_counts``) and a one-sided CUSUM of the log-likelihood ratio for a rate ratio ``rho``
    (Lucas 1985; Poisson increment ``y ln rho - m (rho - 1)``, negative binomial increment
    ``y ln rho - (y + 1/alpha) ln((1 + alpha rho m)/(1 + alpha m))``). An alarm is held while the
    shift lasts (statistic capped at 1.25 h, released below h/2 or after 60 expected vehicles of
    hold, then restarted from zero), so every interval of a lasting fault is flagged and
    down-weighted in the level. The decision limit h
    comes from the in-control alarm rate over the week's bins, each bin's average run length
    computed by the Markov chain of Brook & Evans (1972) (``cusum.cusum_alarm_rate`` explains why
    bins are not averaged into one matrix). The reported ``log_p`` is the smaller of the tail
    ``log_p`` and ``-S``
    (by Ville's inequality a likelihood ratio started at a fixed time exceeds ``e^S`` with
    probability at most ``e^-S``).
``repeated_value``
    the same nonzero count ``k`` times in a row; ``log_p`` is the sum over the ``k - 1`` repeats
    of the log probability that an interval repeats the nonzero count before it, whatever the
    value (``thresholds.log_repeat_p``): a repetition is the evidence, not an unlikely value
    (a level shift makes values unlikely, not repeated).
``over_capacity``
    a count above the physical cap (``capacity.capacity_cap``), whatever the baseline says.
``no_reports``
    a run of ``k`` missing intervals has probability ``q^k`` under the detector's missing rate ``q``;
    a lone missing interval is ragged data, never an alert.

Exactness and continuity
------------------------
Tail probabilities are exact in log space far below the double-precision range (see
``tails.log_p_lower``). Running sums (level posterior, CUSUM, runs) are kept in 2**-24 fixed point in
int64, so they are exact integers whatever the order of addition: scoring a timeline in one call
or in consecutive chunks (passing ``warm_state``) gives bit-identical results.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.domain import KINDS
from service.stats.cusum import (
    CUSUM_CEILING,
    CUSUM_HOLD_VEHICLES,
    CUSUM_RELEASE,
    held_cusum,
    increment_terms,
)
from service.stats.fixedpoint import FIX_SCALE, segment_sums, to_fixed
from service.stats.tails import log_pmf_flat, log_tails_flat, zero_run_log_p
from service.stats.thresholds import Thresholds, log_repeat_p, window_intervals

__all__ = ["KINDS", "Evidence", "WarmState", "score_timeline"]

def _three(values: Iterable[int]) -> tuple[int, int, int]:
    """The three zero-run sums as a tuple (ValueError unless there are exactly three)."""
    a, b, c = values
    return a, b, c


@dataclass(frozen=True)
class WarmState:
    """Everything ``score_timeline`` needs to continue a detector's timeline exactly.

    Fixed-point integers are in units of 2**-24 (vehicles, or natural-log units for CUSUM and
    repeat sums). ``to_dict``/``from_dict`` give a JSON-safe form.
    """

    next_start_s: int
    interval_s: int
    window_y: tuple[int, ...]  # weighted counts of the last W + G intervals (0 if missing)
    window_mu: tuple[int, ...]  # weighted expectations of the same intervals
    window_flag: tuple[int, ...]  # 1 where one of them was flagged
    s_low: int
    s_high: int
    zero_len: int  # present zeros in the run under way (0: none)
    zero_sums: tuple[int, int, int]
    zero_level: float  # level posterior mean when the run began
    zero_level_var: float  # and its relative variance
    repeat_value: float  # last present count (-1: none yet)
    repeat_len: int
    repeat_sum: int
    missing_len: int
    local_day: int | None = None  # local day of the last interval (None: days not given)
    day_age: int = 0  # intervals of that day seen so far
    held_low: int = 0  # expected vehicles the lower CUSUM's alarm under way has been held
    held_high: int = 0  # and the upper one's

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dictionary of the state."""
        return {
            "next_start_s": self.next_start_s,
            "interval_s": self.interval_s,
            "window_y": list(self.window_y),
            "window_mu": list(self.window_mu),
            "window_flag": list(self.window_flag),
            "s_low": self.s_low,
            "s_high": self.s_high,
            "zero_len": self.zero_len,
            "zero_sums": list(self.zero_sums),
            "zero_level": self.zero_level,
            "zero_level_var": self.zero_level_var,
            "repeat_value": self.repeat_value,
            "repeat_len": self.repeat_len,
            "repeat_sum": self.repeat_sum,
            "missing_len": self.missing_len,
            "local_day": self.local_day,
            "day_age": self.day_age,
            "held_low": self.held_low,
            "held_high": self.held_high,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> WarmState:
        """Inverse of ``to_dict``."""
        return cls(
            next_start_s=int(data["next_start_s"]),
            interval_s=int(data["interval_s"]),
            window_y=tuple(int(v) for v in data["window_y"]),
            window_mu=tuple(int(v) for v in data["window_mu"]),
            window_flag=tuple(int(v) for v in data["window_flag"]),
            s_low=int(data["s_low"]),
            s_high=int(data["s_high"]),
            zero_len=int(data["zero_len"]),
            zero_sums=_three(int(v) for v in data["zero_sums"]),
            zero_level=float(data["zero_level"]),
            zero_level_var=float(data["zero_level_var"]),
            repeat_value=float(data["repeat_value"]),
            repeat_len=int(data["repeat_len"]),
            repeat_sum=int(data["repeat_sum"]),
            missing_len=int(data["missing_len"]),
            local_day=None if data.get("local_day") is None else int(data["local_day"]),
            day_age=int(data.get("day_age", 0)),
            held_low=int(data.get("held_low", 0)),
            held_high=int(data.get("held_high", 0)),
        )

    @classmethod
    def fresh(cls, start_s: int, *, interval_s: int, window: int) -> WarmState:
        """State before a detector's first interval."""
        return cls(int(start_s), int(interval_s), (0,) * window, (0,) * window, (0,) * window,
                   0, 0, 0, (0, 0, 0), 1.0, 0.0, -1.0, 0, 0, 0)


@dataclass(frozen=True)
class Evidence:
    """Per-interval evidence of one detector's timeline.

    Attributes
    ----------
    start_s : int
        Start of the first interval (epoch seconds).
    interval_s : int
        Interval length in seconds.
    flag : Mapping[str, numpy.ndarray]
        For each kind in ``KINDS``, a boolean array: the interval is anomalous of that kind.
    log_p : Mapping[str, numpy.ndarray]
        For each kind, the natural-log p-value (<= 0) of the strongest evidence of that kind at
        the interval (0 where there is none).
    expected : numpy.ndarray
        Posterior predictive mean, vehicles per interval (baseline times today's level).
    level : numpy.ndarray
        Posterior mean of today's level factor (1 = as the baseline expects).
    warm_state : WarmState
        State to pass to the next call to continue the timeline.
    """

    start_s: int
    interval_s: int
    flag: Mapping[str, np.ndarray]
    log_p: Mapping[str, np.ndarray]
    expected: np.ndarray
    level: np.ndarray
    warm_state: WarmState

    @property
    def any_flag(self) -> np.ndarray:
        """True where any kind is flagged."""
        out = np.zeros(self.expected.shape, dtype=bool)
        for kind in KINDS:
            out |= self.flag[kind]
        return out


def _day_age(local_day, warm: WarmState, n: int, window: int) -> np.ndarray:
    """Intervals of the same local day before each interval (the level window stops there);
    without local days, every interval sees the whole window."""
    if local_day is None:
        return np.full(n, window)
    idx = np.arange(n)
    new = np.concatenate([[warm.local_day is None or local_day[0] != warm.local_day],
                          local_day[1:] != local_day[:-1]]) if n else np.zeros(0, bool)
    start = np.maximum.accumulate(np.where(new, idx, -1))
    return np.where(start >= 0, idx - start, idx + warm.day_age)


@dataclass(frozen=True, eq=False)
class _ZeroRuns:
    """Runs of present zero counts (missing intervals neither extend nor break a run)."""

    start: np.ndarray  # (n,) index of the run's first zero; -1: from warm state; -2: no run
    length_p: np.ndarray  # (P,) run length at each present interval (0 if not a zero)
    sums_p: list[np.ndarray]  # 3 x (P,) fixed-point run sums of mu, excess and base sd


def _zero_runs(yp, pidx, mu, interval_alpha, sig2, warm: WarmState, n: int) -> _ZeroRuns:
    """Zero runs over the present intervals ``pidx`` (counts ``yp``), continuing ``warm``."""
    isz = yp == 0
    zero_start = np.full(n, -2)
    if not isz.any():  # no zeros: no run, and the run under way (if any) ended before
        none = np.zeros(pidx.size, dtype=np.int64)
        return _ZeroRuns(start=zero_start, length_p=none, sums_p=[none, none.copy(), none.copy()])
    zfirst = isz & np.concatenate([[warm.zero_len == 0], ~isz[:-1]])
    last_first = np.maximum.accumulate(np.where(zfirst, np.arange(pidx.size), -1))
    zstart_p = np.where(last_first >= 0, pidx[np.maximum(last_first, 0)], -1)
    zero_start[pidx[isz]] = zstart_p[isz]
    # run sums over the zeros only (other present intervals add nothing and restart nothing):
    # the run length and the three fixed-point sums, as four rows restarting together
    zi = np.flatnonzero(isz)
    zf = zfirst[zi]
    zpos = pidx[zi]
    mz, s2z = mu[zpos], sig2[zpos]
    rows = np.empty((4, zi.size), dtype=np.int64)
    rows[0] = 1
    terms = np.empty((3, zi.size))
    terms[0] = mz
    terms[1] = interval_alpha[zpos] * mz * mz * (1.0 + s2z)
    terms[2] = mz * np.sqrt(s2z)
    rows[1:] = to_fixed(terms)
    run_sums = segment_sums(rows, zf, [warm.zero_len, *warm.zero_sums])
    full = np.zeros((4, pidx.size), dtype=np.int64)
    full[:, zi] = run_sums
    length_p = full[0]
    sums_p = [full[1], full[2], full[3]]
    return _ZeroRuns(start=zero_start, length_p=length_p, sums_p=sums_p)


def _repeat_runs(yp, warm: WarmState) -> tuple[np.ndarray, np.ndarray]:
    """Runs of the same nonzero count in consecutive present intervals: where each run starts
    and its length so far, at each present interval."""
    prev = np.concatenate([[warm.repeat_value], yp[:-1]])
    rfirst = (yp != prev) | (yp == 0)
    if warm.repeat_len == 0 and yp.size:
        rfirst[0] = True
    length = segment_sums(np.ones(yp.size, dtype=np.int64), rfirst, warm.repeat_len)
    return rfirst, length


def _missing_runs(present, warm: WarmState) -> np.ndarray:
    """Length so far of the run of missing intervals at each interval (0 where present)."""
    if present.all():
        return np.zeros(present.size, dtype=np.int64)
    miss = ~present
    mfirst = miss & np.concatenate([[warm.missing_len == 0], present[:-1]])
    mi = np.flatnonzero(miss)
    miss_len = np.zeros(present.size, dtype=np.int64)
    # consecutive missing intervals form a run; a gap in their indices starts a new one
    gap = np.concatenate([[False], np.diff(mi) > 1]) if mi.size else np.zeros(0, bool)
    miss_len[mi] = segment_sums(np.ones(mi.size, dtype=np.int64), mfirst[mi] | gap,
                                warm.missing_len)
    return miss_len


# Flagged intervals (and the guard before a flag) count in the level at 1/256 of their weight:
# at 1/4 the level learned a lasting fault (a dead lane of a two-lane station, a chattering
# card) within an hour and the alert ended while the fault went on
# (tests/stats/test_scoring.py); dropped outright (weight 0) a false alarm on a quiet detector
# could never release. The CUSUM's hold cap (cusum.CUSUM_HOLD_VEHICLES) bounds that case.
FLAG_SHIFT = 8
# Today's level is more than a day factor. The baseline's own error (log_se) is smooth over the
# day and hour-scale swings last hours, so consecutive intervals share both: the level's prior
# variance is day_alpha + (exp(log_se^2) - 1) + SWING_IN_LEVEL * interval_alpha, so that the
# level learns them, instead of each interval treating them as fresh noise (which let the
# CUSUMs add up one persistent error into an alarm). interval_alpha stays in the predictive
# as well (part of the excess is truly interval to interval). Measured with
# ``bench/calibration.py`` (3 weeks of history, swings sd 0.10, correlation 0.6): false alerts
# 3.5x the budget with neither, 3.0x with the baseline error, 2.2x with both.
BASELINE_ERROR_IN_LEVEL = True
SWING_IN_LEVEL = 1.0

_SCORED_KINDS = ("zero_counts", "low_volume", "high_volume", "repeated_value", "over_capacity")
_STATE_KEYS = ("s_low", "s_high", "held_low", "held_high", "rep_sum", "zref", "zref_var")


class _Timeline:
    """One call of ``score_timeline``: inputs, the parts that do not depend on which intervals
    are flagged, and the per-interval results of the current solution."""

    def __init__(self, counts, present, mu, log_se, day_alpha, interval_alpha, cap, thresholds,
                 warm: WarmState, windows: tuple[int, int, int, int], local_day):
        self.th = thresholds
        self.warm = warm
        self.shortest, self.window, self.information, self.guard = windows
        self.hist = self.window  # intervals of history carried between calls
        n = self.n = present.size
        self.present = present
        self.y = np.where(present, counts, 0.0)
        self.mu, self.se2, self.ia = mu, log_se * log_se, interval_alpha
        sig2 = np.expm1(self.se2)
        if BASELINE_ERROR_IN_LEVEL:
            info_w = 1.0 / (1.0 + interval_alpha * mu)
            level_prior_var = day_alpha + sig2 + SWING_IN_LEVEL * interval_alpha
        else:
            info_w = 1.0 / (1.0 + (interval_alpha + sig2) * mu)
            level_prior_var = day_alpha
        # weighted counts and expectations, history first ("ext" index = interval + hist)
        self.qy = np.concatenate([np.asarray(warm.window_y, dtype=np.int64),
                                  np.where(present, to_fixed(info_w * self.y), 0)])
        self.qm = np.concatenate([np.asarray(warm.window_mu, dtype=np.int64),
                                  np.where(present, to_fixed(info_w * mu), 0)])
        self.hist_flag = np.asarray(warm.window_flag, dtype=bool)
        with np.errstate(divide="ignore"):
            self.prior = np.where(level_prior_var > 0,
                                  1.0 / np.where(level_prior_var > 0, level_prior_var, 1.0),
                                  np.inf)
        self.over = present & (self.y > cap)
        self.local_day = local_day
        self.day_age = _day_age(local_day, warm, n, self.window)
        self.pidx = np.flatnonzero(present)
        yp = self.y[self.pidx]
        self.zeros = _zero_runs(yp, self.pidx, mu, interval_alpha, sig2, warm, n)
        self.rep_first_p, self.rep_len_p = _repeat_runs(yp, warm)
        self.miss_len = _missing_runs(present, warm)
        # results of the current solution
        self.res = {
            "m": np.zeros(n), "level": np.ones(n), "level_var": np.zeros(n),
            "s_low": np.zeros(n, np.int64), "s_high": np.zeros(n, np.int64),
            "held_low": np.zeros(n, np.int64), "held_high": np.zeros(n, np.int64),
            "rep_sum": np.zeros(n, np.int64), "zref": np.zeros(n), "zref_var": np.zeros(n),
        }
        self.flag = {k: np.zeros(n, dtype=bool) for k in KINDS}
        self.log_p = {k: np.zeros(n) for k in KINDS}
        self.flag["over_capacity"][:] = self.over
        self.flag["no_reports"][:] = self.miss_len >= thresholds.missing_run
        self.log_p["no_reports"][:] = self.miss_len * thresholds.log_missing_rate
        # The level the counts themselves show (no interval held out): the repeat test's.
        self.raw_level, self.raw_level_var = self._level(0, n, np.zeros(self.hist + n, bool))

    # -- state just after interval i - 1 -------------------------------------------------------
    def _before(self, key: str, i: int, warm_value):
        return warm_value if i == 0 else self.res[key][i - 1]

    def _side(self, z, expected_fixed, key: str, held_key: str, i0: int, h: float):
        """One CUSUM side over the present intervals of a stretch; state is stored signed
        (negative while an alarm is held), with the expected vehicles held so far
        (``expected_fixed``: the expected vehicles in fixed point)."""
        s0 = self._before(key, i0, getattr(self.warm, key))
        held0 = self._before(held_key, i0, getattr(self.warm, held_key))
        stat, alarm, held = held_cusum(to_fixed(z), int(s0), int(round(h * FIX_SCALE)),
                                       int(round(h * CUSUM_CEILING * FIX_SCALE)),
                                       int(round(h * CUSUM_RELEASE * FIX_SCALE)),
                                       expected_fixed, int(held0),
                                       int(round(CUSUM_HOLD_VEHICLES * FIX_SCALE)))
        return np.where(alarm, -stat, stat), alarm, held

    def _level(self, i0: int, i1: int, flags: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Level posterior mean and relative variance for intervals [i0, i1), given which
        earlier intervals (ext index) were flagged.

        The window for interval t (ext index e = t + hist) has a recent part, the last
        `guard` intervals, counting those after the last flag before t (a flag sends the
        intervals leading up to it out of the level: a shift's onset, scored before its
        alarm); the older part counts intervals not followed by a flag within the guard.
        The older part reaches back until the window holds enough information (between
        `shortest` and `w` intervals in all), never before the start of the local day.
        """
        w, g, hist = self.window, self.guard, self.hist
        base = i0 + hist - w  # the earliest ext index any window here can use
        top = i1 + hist
        span = top - base
        early = max(0, base - g)  # flags this far back can still cut a recent part
        e = np.arange(i0, i1) + hist - base  # position of t in the cumulative arrays below
        day_lo = e - np.minimum(self.day_age[i0:i1], w)
        old_hi = np.maximum(e - g, day_lo)  # the recent part is [old_hi, e)
        if not flags[early:top + g].any():
            # no flag anywhere these windows look: every interval at full weight (the same
            # integers as below with nothing left out and no recent part cut)
            sums = np.zeros((2, span + 1), dtype=np.int64)
            np.cumsum(self.qy[base:top], out=sums[0, 1:])
            np.cumsum(self.qm[base:top], out=sums[1, 1:])
            cuy, cum = sums
            csy, csm = cuy, cum
            rec_m = cum[e] - cum[old_hi]
            rec_y = cuy[e] - cuy[old_hi]
        else:
            keep = ~self._left_out(flags[base:top + g])[:span]
            # rows: weighted counts and expectations; the same at 2**-FLAG_SHIFT of their
            # weight (left-out intervals still count that much; exact integers); the window's
            # mix of both
            parts = np.empty((6, span), dtype=np.int64)
            parts[0], parts[1] = self.qy[base:top], self.qm[base:top]
            np.right_shift(parts[0:2], FLAG_SHIFT, out=parts[2:4])
            parts[4:6] = np.where(keep, parts[0:2], parts[2:4])
            sums = np.zeros((6, span + 1), dtype=np.int64)  # running sums, a leading zero each
            np.cumsum(parts, axis=1, out=sums[:, 1:])
            cuy, cum, cdy, cdm, csy, csm = sums
            flagged_at = np.where(flags[early:top], np.arange(early - base, top - base), -g - 1)
            last_flag = np.maximum.accumulate(flagged_at)[e + base - early - 1]
            rec_lo = np.maximum(old_hi, last_flag + 1)  # full weight from here on
            rec_m = cum[e] - cum[rec_lo] + cdm[rec_lo] - cdm[old_hi]
            rec_y = cuy[e] - cuy[rec_lo] + cdy[rec_lo] - cdy[old_hi]
        j = np.searchsorted(csm, csm[old_hi] + rec_m - self.information, side="right") - 1
        old_lo = np.minimum(np.maximum(j, e - w), e - self.shortest)  # clip
        old_lo = np.minimum(np.maximum(old_lo, day_lo), old_hi)
        sum_y = (rec_y + csy[old_hi] - csy[old_lo]) / FIX_SCALE
        sum_m = (rec_m + csm[old_hi] - csm[old_lo]) / FIX_SCALE
        prior = self.prior[i0:i1]
        has_prior = np.isfinite(prior)
        pr = np.where(has_prior, prior, 1.0)
        shape = pr + sum_y
        level = np.where(has_prior, shape / (pr + sum_m), 1.0)
        level_var = np.where(has_prior, 1.0 / shape, 0.0)
        return level, level_var

    def _zero_run_evidence(self, pi, p0: int, p1: int, i0: int, level, level_var):
        """log p of the zero run under way at each present interval ``pi`` (0 where none),
        judged against the level as it stood when the run began; and that level."""
        zs = self.zeros.start[pi]
        isz = zs >= -1
        zref = np.ones(pi.size)
        zvar = np.zeros(pi.size)
        if not isz.any():  # no zero run in this stretch
            return isz, np.zeros(pi.size), zref, zvar
        here = isz & (zs >= i0)
        zref[here] = level[zs[here] - i0]
        zvar[here] = level_var[zs[here] - i0]
        before = isz & (zs >= 0) & (zs < i0)
        zref[before] = self.res["level"][zs[before]]
        zvar[before] = self.res["level_var"][zs[before]]
        warm_run = isz & (zs == -1)
        zref[warm_run] = self.warm.zero_level
        zvar[warm_run] = self.warm.zero_level_var
        sums = [s[p0:p1] / FIX_SCALE for s in self.zeros.sums_p]
        lp_zero = np.where(isz, zero_run_log_p(sums[0], sums[1], sums[2], zref, zvar), 0.0)
        return isz, lp_zero, zref, zvar

    def _run(self, i0: int, i1: int, flags: np.ndarray) -> dict[str, Any]:
        """Score intervals [i0, i1) given which earlier intervals (ext index) were flagged."""
        th = self.th
        level, level_var = self._level(i0, i1, flags)
        mu = self.mu[i0:i1]
        m = mu * level
        own = 0.0 if BASELINE_ERROR_IN_LEVEL else self.se2[i0:i1]
        alpha = np.expm1(np.log1p(level_var) + own + np.log1p(self.ia[i0:i1]))
        # present intervals of this stretch
        p0, p1 = np.searchsorted(self.pidx, [i0, i1])
        pi = self.pidx[p0:p1]
        loc = pi - i0
        yp, mp, ap = self.y[pi], m[loc], alpha[loc]
        lpmf = log_pmf_flat(yp, mp, ap)
        log_lower, log_upper = log_tails_flat(yp, mp, ap, lpmf)
        # CUSUMs on present intervals
        sl, ol = increment_terms(mp, ap, th.rho_low)
        sh, oh = increment_terms(mp, ap, th.rho_high)
        mp_fixed = to_fixed(mp)
        s_low, alarm_low, held_low = self._side(sl * yp + ol, mp_fixed, "s_low", "held_low", i0,
                                                th.h_low)
        s_high, alarm_high, held_high = self._side(sh * yp + oh, mp_fixed, "s_high", "held_high",
                                                   i0, th.h_high)
        # repeated values
        rfirst = self.rep_first_p[p0:p1]
        rep_lp = np.zeros(yp.size)  # each repeat adds log P(a repetition), whatever the value
        # judged at the level today's counts show, flagged intervals included: a level shift
        # (held out of ``level`` so that it stays alerted) narrows the counts' spread and makes
        # repeats common; it is no evidence of a frozen value
        rl, rv = self.raw_level[pi], self.raw_level_var[pi]
        r_own = 0.0 if BASELINE_ERROR_IN_LEVEL else self.se2[pi]
        r_alpha = np.expm1(np.log1p(rv) + r_own + np.log1p(self.ia[pi]))
        rep_lp[~rfirst] = log_repeat_p(self.mu[pi][~rfirst] * rl[~rfirst], r_alpha[~rfirst])
        contrib = np.where(rfirst, 0, to_fixed(rep_lp))
        rep_sum = segment_sums(contrib, rfirst, int(self._before("rep_sum", i0,
                                                                 self.warm.repeat_sum)))
        rep_len = self.rep_len_p[p0:p1]
        lp_rep = np.where(rep_len >= 2, rep_sum / FIX_SCALE, 0.0)
        isz, lp_zero, zref, zvar = self._zero_run_evidence(pi, p0, p1, i0, level, level_var)
        # flags and strongest evidence per kind
        f_zero = isz & (lp_zero < th.log_alpha_zero_run)
        f_low = ((yp >= 1) & (log_lower < th.log_alpha_low)) | alarm_low
        f_low &= ~f_zero
        f_high = (log_upper < th.log_alpha_high) | alarm_high
        f_rep = (yp > 0) & (rep_len >= th.min_repeat) & (lp_rep < th.log_alpha_repeat)
        over = self.over[pi]
        out = {
            "loc": loc, "m": m, "level": level, "level_var": level_var,
            "s_low": s_low, "s_high": s_high, "held_low": held_low, "held_high": held_high,
            "rep_sum": rep_sum, "zref": zref, "zref_var": zvar,
            "flags": {"zero_counts": f_zero, "low_volume": f_low, "high_volume": f_high,
                      "repeated_value": f_rep, "over_capacity": over},
            "log_p": {
                "zero_counts": lp_zero,
                "low_volume": np.minimum(np.where(yp >= 1, log_lower, 0.0),
                                         -np.abs(s_low) / FIX_SCALE),
                "high_volume": np.minimum(log_upper, -np.abs(s_high) / FIX_SCALE),
                "repeated_value": lp_rep,
                "over_capacity": np.where(over, log_upper, 0.0),
            },
        }
        return out

    def _state_arrays(self, i0: int, i1: int, run: dict[str, Any]) -> dict[str, np.ndarray]:
        """Post-interval state over [i0, i1) as full-length pieces (carried over missing)."""
        n = i1 - i0
        loc = run["loc"]
        if loc.size == n:  # every interval of the stretch present: nothing to carry over
            out = {key: run[key].copy() for key in _STATE_KEYS}
            out["m"], out["level"], out["level_var"] = run["m"], run["level"], run["level_var"]
            return out
        has = np.zeros(n, dtype=bool)
        has[loc] = True
        last = np.maximum.accumulate(np.where(has, np.arange(n), -1))
        pos_of = np.full(n, -1)
        pos_of[loc] = np.arange(loc.size)
        src = np.where(last >= 0, pos_of[np.maximum(last, 0)], -1)
        out = {}
        for key, warm_value in (("s_low", self.warm.s_low), ("s_high", self.warm.s_high),
                                ("held_low", self.warm.held_low),
                                ("held_high", self.warm.held_high),
                                ("rep_sum", self.warm.repeat_sum),
                                ("zref", self.warm.zero_level),
                                ("zref_var", self.warm.zero_level_var)):
            vals = run[key]
            carried = self._before(key, i0, warm_value)
            arr = np.where(src >= 0, vals[np.maximum(src, 0)] if vals.size else carried, carried)
            out[key] = arr.astype(vals.dtype if vals.size else np.asarray(carried).dtype)
        out["m"], out["level"], out["level_var"] = run["m"], run["level"], run["level_var"]
        return out

    def _write(self, i0: int, i1: int, run: dict[str, Any], state: dict[str, np.ndarray],
               upto: int) -> None:
        """Store results for [i0, upto) from a run over [i0, i1)."""
        n = upto - i0
        for key, arr in state.items():
            self.res[key][i0:upto] = arr[:n]
        loc = run["loc"]
        if loc.size == i1 - i0:  # every interval present: loc is 0..i1-i0-1
            for kind in _SCORED_KINDS:
                self.flag[kind][i0:upto] = run["flags"][kind][:n]
                self.log_p[kind][i0:upto] = run["log_p"][kind][:n]
            return
        keep = loc < n
        for kind in _SCORED_KINDS:
            f = self.flag[kind]
            f[i0:upto] = False
            f[i0 + loc[keep]] = run["flags"][kind][keep]
            lp = self.log_p[kind]
            lp[i0:upto] = 0.0
            lp[i0 + loc[keep]] = run["log_p"][kind][keep]

    def _flagged_ext(self) -> np.ndarray:
        out = np.zeros(self.n, dtype=bool)
        for kind in _SCORED_KINDS:
            out |= self.flag[kind]
        return np.concatenate([self.hist_flag, out])

    def _left_out(self, flags: np.ndarray) -> np.ndarray:
        """Intervals (ext index) left out of the older part of a level window: every flagged
        interval and every interval a flag follows within the guard."""
        c = np.concatenate([[0], np.cumsum(flags)])
        k = np.arange(flags.size)
        return (c[np.minimum(k + self.guard + 1, flags.size)] - c[k]) > 0

    def solve(self) -> None:
        """Find the causal solution: each interval is scored with a level posterior built from
        the flags raised before it (see ``_run``).

        Scoring everything with a guess of the flagged set is exact up to the first interval
        whose flag differs from the guess; from there the guess is corrected and only a stretch
        is rescored, until the running state (CUSUMs, runs, level window) coincides with the
        previous solution's again, after which that solution stands. Each round fixes at least
        one more interval, and all arithmetic on running sums is exact integer arithmetic, so the
        result is the same as scoring one interval at a time.
        """
        n, hist = self.n, self.hist
        guess = np.concatenate([self.hist_flag, self.over])  # flags, ext index
        run = self._run(0, n, guess)
        self._write(0, n, run, self._state_arrays(0, n, run), n)
        pos = 0
        while True:
            flags = self._flagged_ext()
            diff = np.flatnonzero(flags[pos:] != guess[pos:]) + pos
            if diff.size == 0:
                break
            d = int(diff[0])
            breaks = np.flatnonzero(np.diff(diff) > hist)
            cluster_end = int(diff[breaks[0]]) if breaks.size else int(diff[-1])
            guess[d:cluster_end + 1] = flags[d:cluster_end + 1]
            self._rescore(d, cluster_end, guess)
            pos = d + 1

    def _rescore(self, d: int, cluster_end: int, guess: np.ndarray) -> None:
        """Rescore after the guessed flags changed at ext indices ``d..cluster_end``, stretch by
        growing stretch, until the running state meets the previous solution's again."""
        n, hist = self.n, self.hist
        # a flag at ext index d first matters to interval d - hist + 1; windows stop seeing
        # the cluster from interval cluster_end + 1 on
        need = cluster_end + 1
        lo, step = max(0, d - hist + 1), max(4 * hist, 256)
        while lo < n:
            hi = min(n, max(lo + step, need + 1))
            run = self._run(lo, hi, guess)
            state = self._state_arrays(lo, hi, run)
            same = np.ones(hi - lo, dtype=bool)
            for key in _STATE_KEYS:
                same &= state[key] == self.res[key][lo:hi]
            same[: max(0, need - lo)] = False
            hit = np.flatnonzero(same)
            if hit.size:
                self._write(lo, hi, run, state, lo + int(hit[0]) + 1)
                return
            self._write(lo, hi, run, state, hi)
            lo, step = hi, step * 2

    def warm_state(self, start_s: int, interval_s: int) -> WarmState:
        n, warm = self.n, self.warm
        if n == 0:
            return warm
        flagged = self._flagged_ext()
        hist = slice(n, n + self.hist)  # the last `hist` intervals, in ext indices
        r = self.res
        if self.pidx.size:
            last_p = self.pidx.size - 1
            zl = int(self.zeros.length_p[last_p])
            zsums = _three(int(s[last_p]) for s in self.zeros.sums_p) if zl else (0, 0, 0)
            rv, rl = float(self.y[self.pidx[-1]]), int(self.rep_len_p[last_p])
        else:
            zl, zsums = warm.zero_len, warm.zero_sums
            rv, rl = warm.repeat_value, warm.repeat_len
        return WarmState(
            next_start_s=int(start_s + n * interval_s),
            interval_s=int(interval_s),
            window_y=tuple(self.qy[hist].tolist()),
            window_mu=tuple(self.qm[hist].tolist()),
            window_flag=tuple(flagged[hist].astype(np.int64).tolist()),
            s_low=int(r["s_low"][-1]),
            s_high=int(r["s_high"][-1]),
            zero_len=zl,
            zero_sums=zsums,
            zero_level=float(r["zref"][-1]) if zl else 1.0,
            zero_level_var=float(r["zref_var"][-1]) if zl else 0.0,
            repeat_value=rv,
            repeat_len=rl,
            repeat_sum=int(r["rep_sum"][-1]),
            missing_len=int(self.miss_len[-1]),
            local_day=None if self.local_day is None else int(self.local_day[-1]),
            day_age=int(self.day_age[-1]) + 1,
            held_low=int(r["held_low"][-1]),
            held_high=int(r["held_high"][-1]),
        )


def _per_interval(value: Any, n: int, name: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    try:
        arr = arr.astype(float) if arr.shape == (n,) else np.broadcast_to(arr, (n,)).astype(float)
    except ValueError:
        raise ValueError(f"{name} must be a scalar or have one value per interval") from None
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def score_timeline(
    start_s: int,
    counts: Any,
    present: Any,
    mu: Any,
    log_se: Any,
    day_alpha: Any,
    interval_alpha: Any,
    *,
    interval_s: int,
    cap: Any,
    thresholds: Thresholds,
    warm_state: WarmState | None = None,
    local_day: Any = None,
) -> Evidence:
    """Score consecutive intervals of one detector, in time order.

    Parameters
    ----------
    start_s : int
        Start of the first interval, epoch seconds. Must equal ``warm_state.next_start_s``
        when continuing.
    counts : array_like
        Vehicles per interval (ignored where not ``present``).
    present : array_like of bool
        False where no count was reported and the interval is past the grace period.
    mu : array_like
        Baseline expected vehicles per interval (> 0).
    log_se : array_like
        Standard error of ``log mu``.
    day_alpha : array_like
        Variance of the gamma day factor (0: no day factor, level fixed at 1).
    interval_alpha : array_like
        Negative binomial alpha of the interval-level excess.
    interval_s : int
        Interval length in seconds.
    cap : int or array_like
        Largest physically plausible count per interval (``capacity.capacity_cap``).
    thresholds : Thresholds
        Decision thresholds (``thresholds.calibrate``) for this ``interval_s``.
    warm_state : WarmState, optional
        State returned by the previous call for the same detector.
    local_day : array_like of int, optional
        The detector's local calendar day of each interval (any integer label, e.g. the
        baseline's day number). The day factor is per local day, so the level window never
        reaches back across a change of day. Without it the window ignores day boundaries,
        which lets yesterday's evening bias tonight's level (more false low/high alerts at
        night on busy detectors).

    Returns
    -------
    Evidence
        Flags and log p-values per kind, the posterior predictive mean, and the state to go on
        with. Scoring a timeline in one call or in consecutive chunks gives identical results.
    """
    if int(interval_s) != thresholds.interval_s:
        raise ValueError("thresholds were derived for a different interval_s")
    present = np.asarray(present, dtype=bool).ravel()
    n = present.size
    counts = np.asarray(counts, dtype=float).ravel()
    if counts.size != n:
        raise ValueError("counts and present must have the same length")
    y = np.where(present, counts, 0.0)
    if np.any(~np.isfinite(y)) or np.any(y < 0) or np.any(y != np.floor(y)):
        raise ValueError("present counts must be non-negative integers")
    mu = _per_interval(mu, n, "mu")
    if np.any(mu <= 0):
        raise ValueError("mu must be positive")
    log_se = _per_interval(log_se, n, "log_se")
    day_alpha = _per_interval(day_alpha, n, "day_alpha")
    interval_alpha = _per_interval(interval_alpha, n, "interval_alpha")
    if np.any(day_alpha < 0) or np.any(interval_alpha < 0) or np.any(log_se < 0):
        raise ValueError("log_se, day_alpha and interval_alpha must be non-negative")
    cap_arr = _per_interval(cap, n, "cap")
    windows = (window_intervals(thresholds.level_memory_s, int(interval_s)),
               window_intervals(thresholds.level_memory_max_s, int(interval_s)),
               int(round(thresholds.level_information * FIX_SCALE)),
               int(round(thresholds.level_guard_s / int(interval_s))))
    if windows[3] > windows[0]:
        raise ValueError("level_guard_s must not exceed level_memory_s")
    window = windows[1]
    if warm_state is None:
        warm_state = WarmState.fresh(int(start_s), interval_s=int(interval_s), window=window)
    elif (warm_state.next_start_s != int(start_s) or warm_state.interval_s != int(interval_s)
          or len(warm_state.window_y) != window):
        raise ValueError("warm_state does not continue this timeline (start, interval or "
                         "level memory differ)")
    if local_day is not None:
        local_day = np.asarray(local_day).ravel()
        if local_day.size != n or not np.issubdtype(local_day.dtype, np.integer):
            raise ValueError("local_day must give an integer day for every interval")
        local_day = local_day.astype(np.int64)
    tl = _Timeline(y, present, mu, log_se, day_alpha, interval_alpha, cap_arr, thresholds,
                   warm_state, windows, local_day)
    if n:
        tl.solve()
    return Evidence(
        start_s=int(start_s),
        interval_s=int(interval_s),
        flag={k: tl.flag[k] for k in KINDS},
        log_p={k: tl.log_p[k] for k in KINDS},
        expected=tl.res["m"],
        level=tl.res["level"],
        warm_state=tl.warm_state(int(start_s), int(interval_s)),
    )
