"""Hits on the force (hammer) channel of an impact test: found, measured and judged.

:func:`check_hit` looks at one force record and says whether it holds one clean hit. The
rules (docs/modes.md, "Hits"):

- **Noise level** ``sigma``: :func:`monitor.modes.noise.noise_level`, the robust standard
  deviation of the quietest eighth of the record (the pre-trigger segment or the quiet
  tail), measured from the record's median (the channel's offset).
- **Hit**: the largest excursion from the median must exceed :data:`HIT_THRESHOLD` x
  ``sigma``. The largest of N Gaussian noise samples is about ``sqrt(2 ln N)`` sigma:
  5.3 sigma for a million samples, 6.4 for a billion; 10 sigma leaves a margin a noise-only
  record does not reach.
- **Pulses**: runs above the pulse level ``max(10 sigma, 10 % of the hit's peak)`` in the
  hit's direction, with hysteresis: a pulse ends when the force falls below half the level
  (a Schmitt trigger, so noise on a falling edge does not split one pulse in two).
- **Pulse width**: the time the hit's pulse stays above the pulse level, interpolated at
  both crossings. A half-sine of duration T is above 10 % of its peak for
  ``T (1 - 2 asin(0.1) / pi) = 0.936 T``.
- **Double hit**: any further pulse. Above 10 % of the hit's peak it ripples the force
  spectrum by more than +-10 %: two pulses ``a`` apart in amplitude ratio and ``tau`` in
  time have the spectrum ``F(f) (1 + a exp(-2 pi j f tau))`` (Fourier shift theorem).
- **Not an impact**: a pulse lasting more than :data:`MAX_PULSE_FRACTION` of the record.
- **Clipped**: :data:`FLAT_TOP_SAMPLES` or more consecutive samples at the pulse's extreme
  value (within 1 ppm) spanning at least :data:`FLAT_TOP_FRACTION` of the pulse width; a
  sampled smooth pulse has at most two samples at its top, a pulse flattened at the
  range of the sensor or the converter has many.
- **Over range**: with a stated range of the force channel, any sample at or beyond
  :data:`RANGE_FRACTION` of it.

Forces are in the force channel's unit (N, kN or lbf), times in seconds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike

from monitor.model import validate
from monitor.modes.noise import noise_level

#: A hit must stand this many noise levels above the record's median.
HIT_THRESHOLD = 10.0
#: Pulses are counted, and the width measured, above this fraction of the hit's peak.
PULSE_FRACTION = 0.1
#: A pulse ends below this fraction of the pulse level (hysteresis).
PULSE_RELEASE = 0.5
#: A pulse longer than this fraction of the record is not an impact.
MAX_PULSE_FRACTION = 0.1
#: A flat top: at least this many consecutive samples at the extreme value ...
FLAT_TOP_SAMPLES = 3
#: ... spanning at least this fraction of the pulse width.
FLAT_TOP_FRACTION = 0.1
#: Relative tolerance of "at the extreme value".
FLAT_TOP_TOLERANCE = 1e-6
#: With a stated range, samples at or beyond this fraction of it are an overload.
RANGE_FRACTION = 0.999

Problem = Literal["no_hit", "double_hit", "not_impact", "clipped", "over_range"]


@dataclass(frozen=True)
class Pulse:
    """One pulse of a force record: ``start_s`` (first sample above the pulse level) and
    ``peak_s`` from the record's first sample, s; ``peak`` its extreme force (signed,
    from the record's median); ``width_s`` its time above the pulse level, s."""

    start_s: float
    peak_s: float
    peak: float
    width_s: float


@dataclass(frozen=True)
class HitCheck:
    """What :func:`check_hit` found in one force record.

    ``noise`` and ``threshold`` (HIT_THRESHOLD x noise) in the force unit; ``peak`` the
    largest excursion from the median (signed); ``pulses`` in time order (the hit's own
    pulse is the one holding ``peak``); ``flat_samples`` the longest run of samples at
    the hit's extreme value; ``problems`` ``(kind, sentence)`` pairs, empty for a clean
    hit.
    """

    noise: float
    threshold: float
    peak: float
    pulses: tuple[Pulse, ...]
    flat_samples: int
    problems: tuple[tuple[Problem, str], ...] = field(default=())

    @property
    def accepted(self) -> bool:
        return not self.problems

    @property
    def width_s(self) -> float | None:
        """Width of the hit's pulse, s (None without a hit)."""
        main = self.main_pulse
        return None if main is None else main.width_s

    @property
    def main_pulse(self) -> Pulse | None:
        return max(self.pulses, key=lambda p: abs(p.peak)) if self.pulses else None

    def message(self) -> str:
        """The problems as one sentence (empty for a clean hit)."""
        return "; ".join(text for _, text in self.problems)

    def to_json(self) -> dict[str, Any]:
        w = self.width_s
        return {
            "accepted": self.accepted,
            "peak": self.peak,
            "noise": self.noise,
            "threshold": self.threshold,
            "width_ms": None if w is None else w * 1e3,
            "pulses": len(self.pulses),
            "flat_samples": self.flat_samples,
            "problems": [{"kind": k, "message": m} for k, m in self.problems],
        }


def _crossing(a: np.ndarray, i: int, j: int, level: float) -> float:
    """Fractional sample index where ``a`` passes ``level`` between samples i and j."""
    if a[j] == a[i]:
        return float(j)
    return i + (level - a[i]) / (a[j] - a[i]) * (j - i)


def _pulses(a: np.ndarray, level: float, fs: float, sign: float) -> list[Pulse]:
    """Runs of ``a`` above ``level`` with release below ``PULSE_RELEASE x level``; their
    peaks multiplied by ``sign`` (the hit's direction in the record)."""
    out: list[Pulse] = []
    n = a.size
    above = np.flatnonzero(a > level)
    released = np.flatnonzero(a < PULSE_RELEASE * level)
    while above.size:
        s = int(above[0])
        after = released[released > s]
        e = int(after[0]) - 1 if after.size else n - 1
        seg = a[s : e + 1]
        k = s + int(np.argmax(seg))
        over = np.flatnonzero(seg > level)
        first, last = s + int(over[0]), s + int(over[-1])
        t0 = _crossing(a, first - 1, first, level) if first > 0 else float(first)
        t1 = _crossing(a, last, last + 1, level) if last + 1 < n else float(last)
        out.append(Pulse(start_s=first / fs, peak_s=k / fs, peak=sign * float(a[k]),
                         width_s=max(t1 - t0, 0.0) / fs))
        above = above[above > e]
    return out


def _flat_run(x: np.ndarray, k: int) -> int:
    """Consecutive samples around index k equal to x[k] within FLAT_TOP_TOLERANCE."""
    tol = FLAT_TOP_TOLERANCE * abs(x[k])
    lo = hi = k
    while lo > 0 and abs(x[lo - 1] - x[k]) <= tol:
        lo -= 1
    while hi + 1 < x.size and abs(x[hi + 1] - x[k]) <= tol:
        hi += 1
    return hi - lo + 1


def check_hit(
    force: ArrayLike, fs_hz: float, *, force_range: float | None = None, unit: str = "N",
) -> HitCheck:
    """Find and judge the hit in one force record.

    Parameters
    ----------
    force : array_like
        One force record (1-D), ``unit``.
    fs_hz : float
        Sample rate, Hz.
    force_range : float, optional
        Stated range (full scale) of the force channel, ``unit``.
    unit : str
        Force unit, for the messages.

    Returns
    -------
    HitCheck
    """
    x = validate.real_samples(force, "force", minimum=16)
    fs = validate.sample_rate_hz(fs_hz)
    rng = None if force_range is None else validate.positive(force_range, "force_range")
    d = x - float(np.median(x))
    sigma = noise_level(d)
    threshold = HIT_THRESHOLD * sigma
    k = int(np.argmax(np.abs(d)))
    peak = float(d[k])
    problems: list[tuple[Problem, str]] = []
    if rng is not None and float(np.max(np.abs(x))) >= RANGE_FRACTION * rng:
        problems.append(("over_range", (
            f"the force reaches {float(np.max(np.abs(x))):.4g} {unit}, at or beyond the stated range of "
            f"{rng:.4g} {unit} (overload)")))
    if not abs(peak) > threshold:
        problems.insert(0, ("no_hit", (
            f"no hit: the largest force, {abs(peak):.3g} {unit} from the median, stays below "
            f"{HIT_THRESHOLD:g} x the noise level of {sigma:.3g} {unit}")))
        return HitCheck(sigma, threshold, peak, (), 0, tuple(problems))
    sign = math.copysign(1.0, peak)
    a = d * sign  # the hit's direction is positive
    level = max(threshold, PULSE_FRACTION * abs(peak))
    pulses = _pulses(a, level, fs, sign)
    main = max(pulses, key=lambda p: abs(p.peak))
    flat = _flat_run(x, k)
    if flat >= FLAT_TOP_SAMPLES and flat / fs >= FLAT_TOP_FRACTION * main.width_s:
        problems.append(("clipped", (
            f"the force is flat at {float(x[k]):.4g} {unit} for {flat} samples at its peak "
            "(a clipped or overloaded hammer)")))
    if main.width_s > MAX_PULSE_FRACTION * x.size / fs:
        problems.append(("not_impact", (
            f"the force stays above {level:.3g} {unit} for {main.width_s:.3g} s of the "
            f"{x.size / fs:.3g} s record: not an impact")))
    others = [p for p in pulses if p is not main]
    if others:
        second = max(others, key=lambda p: abs(p.peak))
        dt_ms = (second.peak_s - main.peak_s) * 1e3
        problems.append(("double_hit", (
            f"a second pulse of {abs(second.peak):.3g} {unit} comes {dt_ms:+.1f} ms from the "
            f"hit of {abs(peak):.3g} {unit} (double hit)")))
    return HitCheck(sigma, threshold, peak, tuple(pulses), flat, tuple(problems))


def check_hits(
    force: ArrayLike, fs_hz: float, *, force_range: float | None = None, unit: str = "N",
) -> tuple[HitCheck, ...]:
    """:func:`check_hit` for each row of a (hits x samples) array, or for a 1-D record."""
    x = np.asarray(force, dtype=float)
    rows = x[np.newaxis, :] if x.ndim == 1 else x
    return tuple(check_hit(r, fs_hz, force_range=force_range, unit=unit) for r in rows)
