"""What the batch steps and the periodic jobs share: the store, the detectors, the status
views, the snapshot cadence, each point's newest spectrum, the retry loop and the one lock
that keeps them in step.

The service (monitor/service/service.py) builds one :class:`Core`; the batch
(monitor/service/batch.py, monitor/service/isolation.py) and the periodic jobs
(monitor/service/periodic.py, monitor/service/registry_changes.py) work through it.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import TypeVar

from sqlalchemy.orm import Session

from monitor.metrics import ServiceMetrics
from monitor.service.cadence import SnapshotCadence
from monitor.service.evidence import LatestSpectra
from monitor.service.failures import Retrier
from monitor.service.payloads import StatusBoard
from monitor.service.states import DetectorStates
from monitor.settings import Settings
from monitor.store import Store

T = TypeVar("T")


@dataclass
class Core:
    """The parts of one service that its units of work share.

    ``lock`` is held around every transaction that takes detector states and while the
    registry is followed: the worker and the periodic thread both do. ``clock`` gives epoch
    seconds (the service's clock, which the demo replaces with the replayed plant's)."""

    settings: Settings
    store: Store
    states: DetectorStates
    board: StatusBoard
    cadence: SnapshotCadence
    retrier: Retrier
    metrics: ServiceMetrics
    clock: Callable[[], float]
    lock: threading.RLock
    stop: threading.Event
    #: Readings set aside as dead letters so far (monitor/service/isolation.py).
    set_aside: int = 0
    #: The cadence of the raw waveforms kept (``spectra.waveform_interval_s``).
    waveform_cadence: SnapshotCadence = field(default_factory=lambda: SnapshotCadence(0.0, waveforms=True))
    #: Each point's newest velocity spectrum, for the evidence of speed messages'
    #: transitions (monitor/service/evidence.py).
    latest: LatestSpectra = field(default_factory=LatestSpectra)

    @property
    def postgres(self) -> bool:
        return self.store.engine.dialect.name == "postgresql"

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """The lock, then one write transaction (committed at the end of the block)."""
        with self.lock, self.store.write_transaction() as s:
            yield s

    def retry(self, work: Callable[[], T], machines: Iterable[str]) -> T:
        """``work()`` until it commits, retried while its errors are transient; after
        each failed attempt the detectors of ``machines`` are reloaded at their next use."""
        held = list(machines)
        return self.retrier.run(work, on_failure=lambda: self.states.forget(held))
