"""Cost of the full analysis of one waveform against one bare scipy.fft.rfft of the block.

Both are timed interleaved in the same run (the host is shared, so a ratio to a floor
measured alongside is the figure that means something). Target: full analysis at most 6x
one rfft at 65,536 samples, on both paths: running speed measured, and estimated from
the vibration (the expensive path). Each row carries the rfft floor timed beside it.
"""

from __future__ import annotations

import statistics
import time

import numpy as np
import scipy.fft

from monitor.analysis.waveform import analyse_waveform
from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Point

TARGET_RATIO = 6.0


def _waveform(n: int, *, with_speed: bool) -> tuple[Waveform, Machine, Point]:
    """A synthetic fan: 1x, 2x and 9x (blade pass) plus white noise, acceleration."""
    fs = 25600.0
    rng = np.random.default_rng(12345)
    t = np.arange(n) / fs
    f0 = 18.37
    x = (
        0.20 * np.cos(2 * np.pi * f0 * t + 0.3)
        + 0.30 * np.cos(2 * np.pi * 2 * f0 * t + 1.1)
        + 1.00 * np.cos(2 * np.pi * 9 * f0 * t + 2.0)
        + 0.05 * rng.standard_normal(n)
    ).astype(np.float32)
    point = Point(id="de-h", quantity="acceleration", unit="m/s^2", fs_hz=fs)
    machine = Machine(
        id="bench-fan", speed_range_rpm=(300.0, 1500.0), excitation_orders=(1, 2, 9), points=(point,)
    )
    wf = Waveform(
        machine="bench-fan",
        point="de-h",
        ts=1.7e9,
        fs_hz=fs,
        unit="m/s^2",
        samples=x,
        speed_hz=f0 if with_speed else None,
    )
    return wf, machine, point


def _median_pair(f_a, f_b, repeats: int, inner: int) -> tuple[float, float]:
    """Median seconds per call of f_a and f_b, timed alternately."""
    ta, tb = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(inner):
            f_a()
        t1 = time.perf_counter()
        for _ in range(inner):
            f_b()
        t2 = time.perf_counter()
        ta.append((t1 - t0) / inner)
        tb.append((t2 - t1) / inner)
    return statistics.median(ta), statistics.median(tb)


def run(quick: bool) -> list[dict]:
    repeats, inner = (5, 3) if quick else (31, 5)
    rows: list[dict] = []
    for n in (16384, 65536):
        for with_speed in (False, True):
            wf, machine, point = _waveform(n, with_speed=with_speed)
            block = np.asarray(wf.samples, dtype=np.float64)
            analyse_waveform(wf, machine, point)  # warm caches (windows, bins)
            scipy.fft.rfft(block)
            t_an, t_fft = _median_pair(
                lambda wf=wf, m=machine, p=point: analyse_waveform(wf, m, p),
                lambda b=block: scipy.fft.rfft(b),
                repeats,
                inner,
            )
            ratio = t_an / t_fft
            path = "measured speed" if with_speed else "estimated speed"
            row = {
                "name": f"analyse_waveform {n} samples, {path} (vs rfft)",
                "value": t_an * 1e3,
                "unit": "ms",
                "floor": t_fft * 1e3,
                "ratio": ratio,
            }
            if n == 65536:
                row["target"] = f"<= {TARGET_RATIO:g}x rfft"
                row["met"] = ratio <= TARGET_RATIO
            rows.append(row)
    return rows
