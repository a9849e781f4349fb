"""Sensor health: is a waveform fit to judge the machine by?

Checks on one block of samples (flat line, clipping, spikes, dropouts), on the block
against the registry (sample rate, unit) and on the stream (stale: no reading for several
expected intervals). A flagged reading raises a ``sensor_fault`` alarm and is kept out of
machine alarms: a broken sensor says nothing about the machine.

Thresholds are common practice (no published source), chosen so that sinusoids, broadband
noise and their sums never trip them (see tests/test_health.py) while the faults do:

- flat line: the block's peak-to-peak is zero (or below ``flat_ptp``), or one value repeats
  for more than ``flat_run_fraction`` of the block;
- clipping: at least ``clip_fraction`` of the samples sit in runs of 3 or more consecutive
  samples equal to the block's maximum or minimum (a sensor or amplifier at its rail);
- spikes: 1 to ``spike_max_fraction`` of the samples lie more than ``spike_z`` robust
  standard deviations (1.4826 x MAD) from the median: isolated, not a signal;
- dropouts: non-finite samples, or runs of exact zeros of ``dropout_run`` samples or more;
- sample rate: differs from the point's ``fs_hz`` by more than 0.1 %;
- unit: differs from the point's ``unit``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from monitor.detection.growth import median_at, sorted_median
from monitor.detection.kernels import block_scan, strided_order_stats
from monitor.model.readings import Waveform
from monitor.model.registry import Point

#: The checks, by the names alarms and stored evaluations give them.
HealthCheck = Literal["flat_line", "clipping", "spikes", "dropouts", "sample_rate", "unit", "stale"]
CHECKS: tuple[HealthCheck, ...] = ("flat_line", "clipping", "spikes", "dropouts", "sample_rate", "unit",
                                   "stale")


@dataclass(frozen=True)
class HealthLimits:
    """Thresholds of the block checks (dimensionless fractions unless stated)."""

    flat_ptp: float = 0.0
    flat_run_fraction: float = 0.10
    clip_fraction: float = 0.005
    spike_z: float = 25.0
    spike_max_fraction: float = 0.01
    dropout_run: int = 16
    fs_rel_tol: float = 1e-3


@dataclass(frozen=True)
class HealthFlag:
    """One failed check: ``check`` (one of :data:`CHECKS`), a plain ``message`` and the
    measured ``value`` behind it."""

    check: HealthCheck
    message: str
    value: float | str | None = None

    def to_json(self) -> dict:
        return {"check": self.check, "message": self.message, "value": self.value}


@dataclass(frozen=True)
class HealthReport:
    """Result of the checks on one waveform; ``ok`` when no check failed."""

    flags: tuple[HealthFlag, ...] = field(default_factory=tuple)

    @property
    def ok(self) -> bool:
        return not self.flags

    @property
    def checks(self) -> tuple[HealthCheck, ...]:
        return tuple(f.check for f in self.flags)

    def to_json(self) -> dict:
        return {"ok": self.ok, "flags": [f.to_json() for f in self.flags]}


_DEFAULT_LIMITS = HealthLimits()
_HEALTHY = HealthReport()


def _sorted_mad(s: np.ndarray, med: float) -> float:
    """Median absolute deviation of the ascending ``s`` about its median ``med``."""
    # |s - med| of the sorted s falls then rises: its sort is quick.
    d = np.abs(s - med)
    d.sort()
    return sorted_median(d)


def _median_and_mad(a: np.ndarray) -> tuple[float, float]:
    """Median and median absolute deviation of finite samples ``a``.

    Two sorts of a small array: cheaper here than np.median's partitions with their NaN
    and shape handling, and the same values."""
    s = a.copy()
    s.sort()
    med = sorted_median(s)
    return med, _sorted_mad(s, med)


def _mad_lower_bound(at: Any, n: int, med: float) -> float:
    """A value the MAD of ``n`` ascending values (median ``med``) is never below; ``at[k]``
    gives the k-th value (an array, or a mapping holding ranks n//4 and n//4 + n//2).

    Fewer than half of the values lie strictly between s[n//4] and s[n//4 + n//2], so at
    least half of them are as far from the median as the nearer of those two (rounding
    keeps the order), and so is the MAD: when no sample passes the spike limit built on
    this bound, none passes the limit built on the MAD, and its second sort is spared."""
    q = n // 4
    return min(float(at[q + n // 2]) - med, med - float(at[q]))


# Per subset size: the ranks _mad_lower_bound and sorted_median read.
_SUBSET_RANKS: dict[int, np.ndarray] = {}


def _subset_median_and_bound(x: np.ndarray, step: int) -> tuple[float, float]:
    """``(sorted_median(s), _mad_lower_bound(s, s.size, median))`` for s = sort(x[::step]),
    from the four order statistics they read, selected without the sort
    (monitor/detection/kernels.py)."""
    n = -(-x.size // step)
    ranks = _SUBSET_RANKS.get(n)
    if ranks is None:
        q = n // 4
        ranks = _SUBSET_RANKS[n] = np.array(sorted({q, (n - 1) // 2, n // 2, q + n // 2}), dtype=np.int64)
    at = dict(zip(ranks.tolist(), strided_order_stats(x, step, ranks).tolist(), strict=True))
    med = median_at(at, n)
    return med, _mad_lower_bound(at, n, med)


def _longest_run(mask: np.ndarray) -> int:
    if not mask.any():
        return 0
    d = np.diff(np.concatenate(([0], mask.view(np.int8), [0])))
    starts = np.flatnonzero(d == 1)
    ends = np.flatnonzero(d == -1)
    return int((ends - starts).max())


def _samples_in_runs(mask: np.ndarray, min_run: int) -> int:
    if not mask.any():
        return 0
    d = np.diff(np.concatenate(([0], mask.view(np.int8), [0])))
    lengths = np.flatnonzero(d == -1) - np.flatnonzero(d == 1)
    return int(lengths[lengths >= min_run].sum())


def check_block(samples: np.ndarray, limits: HealthLimits | None = None) -> tuple[HealthFlag, ...]:
    """Flat line, clipping, spikes and dropouts in one block of samples (any unit)."""
    lim = limits or _DEFAULT_LIMITS
    x = np.asarray(samples, dtype=float)
    if x.ndim != 1 or x.size < 8:
        raise ValueError(f"samples must be a 1-D array of at least 8 samples, got shape {x.shape}.")
    n = x.size
    flags: list[HealthFlag] = []
    # One compiled pass: whether every sample is finite, the maximum, the minimum and the
    # number of equal neighbours (monitor/detection/kernels.py; numpy took three passes).
    all_finite, xmax, xmin, n_same = block_scan(np.ascontiguousarray(x))
    if not all_finite:
        finite = np.isfinite(x)
        bad = int(n - np.count_nonzero(finite))
        flags.append(HealthFlag("dropouts", f"{bad} samples are not finite numbers", bad))
        x = x[finite]
        if x.size < 8:
            return tuple(flags)
        _, xmax, xmin, n_same = block_scan(x)
    ptp = xmax - xmin
    if ptp <= lim.flat_ptp:
        flags.append(HealthFlag("flat_line", "the signal does not vary at all", ptp))
        return tuple(flags)
    # Equal neighbours, counted once: a run of zeros of length L has L - 1 of them and a
    # repeated value as many, so with few of them neither check needs another pass.
    zero_run = 0
    if n_same >= lim.dropout_run - 1:
        zeros = x == 0.0
        zero_run = _longest_run(zeros) if np.count_nonzero(zeros) >= lim.dropout_run else 0
    if zero_run >= lim.dropout_run:
        flags.append(HealthFlag("dropouts", f"{zero_run} consecutive samples are exactly zero", zero_run))
    elif n_same > lim.flat_run_fraction * n:
        longest_same = _longest_run(x[1:] == x[:-1]) + 1
        if longest_same > lim.flat_run_fraction * n:
            flags.append(HealthFlag(
                "flat_line", f"one value repeats for {longest_same} of {n} samples", longest_same))
    # A run of L >= 3 samples at a rail holds L - 1 >= 2L/3 equal neighbours, so a block
    # with fewer equal neighbours than 2/3 of the clipping limit cannot be clipped (a
    # vibration block usually has none): the rail passes are skipped.
    if n_same >= (2.0 / 3.0) * lim.clip_fraction * n:
        at_rail = (x == xmax) | (x == xmin)
        if np.count_nonzero(at_rail) >= lim.clip_fraction * n:
            clipped = _samples_in_runs(at_rail, 3)
            if clipped >= lim.clip_fraction * n:
                flags.append(HealthFlag("clipping", f"{clipped} samples sit at the signal's rails", clipped / n))
    # Median and MAD from an evenly strided subset of about 512 samples: robust
    # statistics of a stationary block barely change (the median's standard error is
    # 1.25 sigma / sqrt(512), about 6 % of sigma, against a limit of spike_z = 25 sigma),
    # and the full median is costly.
    step = max(1, x.size // 512)
    med, bound = _subset_median_and_bound(x, step)
    if bound > 0:
        lim_low = lim.spike_z * (1.4826 * bound)
        if not (xmax - med > lim_low or med - xmin > lim_low):
            return tuple(flags)  # no sample beyond the limit on the bound (see there)
    sub = x[::step].copy()
    sub.sort()
    sigma = 1.4826 * _sorted_mad(sub, med)
    if sigma == 0.0 and sub.size < x.size:
        # The stride aliased onto a periodic signal; use every sample.
        med, mad = _median_and_mad(x)
        sigma = 1.4826 * mad
    # The largest deviation from the median is at the maximum or the minimum (rounding
    # is monotonic), so a block with neither beyond the limit needs no counting pass.
    lim_dev = lim.spike_z * sigma
    if sigma > 0 and (xmax - med > lim_dev or med - xmin > lim_dev):
        k = int(np.count_nonzero(np.abs(x - med) > lim_dev))
        if 1 <= k <= max(1, int(lim.spike_max_fraction * n)):
            flags.append(
                HealthFlag("spikes", f"{k} isolated samples exceed {lim.spike_z:g} robust standard deviations", k)
            )
    return tuple(flags)


def check_waveform(waveform: Waveform, point: Point, limits: HealthLimits | None = None) -> HealthReport:
    """All per-reading checks of ``waveform`` against its registry ``point``."""
    lim = limits or _DEFAULT_LIMITS
    flags: list[HealthFlag] = []
    if point.fs_hz is not None and (
        not math.isfinite(waveform.fs_hz) or abs(waveform.fs_hz - point.fs_hz) > lim.fs_rel_tol * point.fs_hz
    ):
        flags.append(
            HealthFlag("sample_rate", f"sample rate {waveform.fs_hz:g} Hz, registry expects {point.fs_hz:g} Hz",
                       float(waveform.fs_hz))
        )
    if waveform.unit != point.unit:
        flags.append(
            HealthFlag("unit", f"unit {waveform.unit!r}, registry expects {point.unit!r}", waveform.unit)
        )
    flags.extend(check_block(waveform.samples, lim))
    return HealthReport(tuple(flags)) if flags else _HEALTHY


def is_stale(last_ts: float | None, now: float, expected_interval_s: float | None, intervals: float) -> bool:
    """True when no reading came for ``intervals`` expected intervals (seconds)."""
    if last_ts is None or expected_interval_s is None or expected_interval_s <= 0:
        return False
    return now - last_ts > intervals * expected_interval_s
