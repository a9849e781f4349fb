"""Which readings keep their spectra: one snapshot per point per cadence interval.

A waveform's spectra (native and velocity) are kept when no spectrum of its point was kept
in the ``spectra.snapshot_interval_s`` up to it (docs/configuration.md), and always as the
evidence of an alarm transition. A second cadence, ``spectra.waveform_interval_s``, keeps
the raw time waveforms the same way (``waveforms=True``). The instants kept are known from this process's own
commits when each reading of a batch has one inside its window (exact: a committed
snapshot inside the window settles "not due"), else from one query.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from typing import Any

from monitor.analysis.waveform import ReadingAnalysis
from monitor.model.readings import Waveform
from monitor.service.items import WaveformMessage
from monitor.store.writes import snapshot_times, to_datetime

#: Snapshot instants kept per (machine, point).
Kept = dict[tuple[str, str], list[dt.datetime]]


class SnapshotCadence:
    """The snapshot instants this process committed, per point; ``interval_s`` the
    cadence, s (0: spectra are kept only as evidence); ``waveforms`` the cadence of the
    raw waveforms (``waveform_snapshots``) instead of the spectra."""

    def __init__(self, interval_s: float, *, waveforms: bool = False) -> None:
        self.interval_s = interval_s
        self.waveforms = waveforms
        self._kept: Kept = {}

    def kept(self, conn: Any, waves: Sequence[WaveformMessage]) -> Kept:
        """Snapshot instants kept per point, enough to decide each of ``waves``' cadence."""
        if not self.interval_s or not waves:
            return {}
        window = dt.timedelta(seconds=self.interval_s)
        tss = [to_datetime(it.reading.ts) for it in waves]
        points = [(it.reading.machine, it.reading.point) for it in waves]
        if all(any(ts - window < t <= ts for t in self._kept.get(p, ())) for p, ts in zip(points, tss, strict=True)):
            return {p: list(self._kept[p]) for p in set(points)}
        return snapshot_times(conn, points, min(tss) - window, max(tss), waveforms=self.waveforms)

    def due(self, kept: Kept, a: ReadingAnalysis | Waveform) -> bool:
        """No spectrum of the point kept in the cadence interval up to this reading
        (counting those kept earlier in the batch); records this one when due."""
        if not self.interval_s:
            return False
        ts = to_datetime(a.ts)
        since = ts - dt.timedelta(seconds=self.interval_s)
        times = kept.setdefault((a.machine, a.point), [])
        if any(since < t <= ts for t in times):
            return False
        times.append(ts)
        return True

    def remember(self, kept: Kept) -> None:
        """After the commit: the snapshots the batch kept (or saw), for the next batches."""
        for p, times in kept.items():
            if times:
                # Only the latest window matters for readings arriving in order.
                latest = max(times)
                self._kept[p] = sorted(t for t in {*self._kept.get(p, ()), *times}
                                       if t > latest - dt.timedelta(seconds=2 * self.interval_s))
