"""The notifier: each matching alarm transition handed to its targets' queues after the
batch that made it committed, and delivered from there by the targets' own threads.

The service calls :meth:`Notifier.submit` after a commit (monitor/service/service.py,
``announce``): it asks the eligibility hook (:func:`monitor.notify.rules.not_shelved`),
matches the rules and puts the transition on the queue of each target they name, never
waiting: a full queue drops the transition, counts it and logs one line. Each target (the
webhook, e-mail) has a bounded queue and one worker thread, which tries a transition up
to ``max_attempts`` times, waiting ``backoff_s``, then twice that, and so on up to
``backoff_max_s`` between attempts (exponential back-off), and records every attempt in
the store (``notification_deliveries``) and in the metrics. A dead target thus fills only
its own queue; the batches never wait for it.
"""

from __future__ import annotations

import datetime as dt
import logging
import queue
import threading
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from monitor.model.timefmt import parse_iso_utc
from monitor.notify.mail import SmtpAccount, build_message, mail_text, send_mail
from monitor.notify.rules import Eligible, not_shelved, targets_for
from monitor.notify.webhook import DeliveryError, event_body, post_event, shown_url
from monitor.redact import add_secret, redact

if TYPE_CHECKING:
    from monitor.metrics import ServiceMetrics
    from monitor.settings import NotificationSettings
    from monitor.store import Store

log = logging.getLogger("whirlwatch.notify")

#: How long a worker waits on its empty queue before looking at the stop flag again, s.
POLL_S = 0.5


def backoff_delay(failed_attempt: int, first_s: float, max_s: float) -> float:
    """Wait after failed attempt number ``failed_attempt`` (1 = the first), s:
    ``first_s * 2**(failed_attempt - 1)``, at most ``max_s`` (exponential back-off)."""
    if failed_attempt < 1:
        raise ValueError(f"failed_attempt counts from 1, got {failed_attempt!r}.")
    return min(max_s, first_s * 2.0 ** min(failed_attempt - 1, 60))


@dataclass(frozen=True)
class Job:
    """One transition for one target: the alarm event, the machine's location, and the
    e-mail recipients (e-mail only)."""

    event: Mapping[str, Any]
    location: str | None
    email_to: tuple[str, ...] = ()


@dataclass(frozen=True)
class Retry:
    """How a target is retried: at most ``max_attempts`` attempts, back-off from
    ``backoff_s`` doubling up to ``backoff_max_s`` (s)."""

    max_attempts: int
    backoff_s: float
    backoff_max_s: float


class Channel:
    """One target: a bounded queue and the worker thread that empties it.

    ``send(job)`` makes one attempt and returns what the target answered, or raises
    :class:`DeliveryError`; ``destination(job)`` is what the record names (no secret);
    ``record(target, job, destination, attempt, outcome, detail)`` stores one attempt."""

    def __init__(self, name: str, send: Callable[[Job], str], destination: Callable[[Job], str],
                 retry: Retry, queue_size: int, metrics: ServiceMetrics, record: Callable[..., None]) -> None:
        self.name = name
        self._send = send
        self._destination = destination
        self._retry = retry
        self._metrics = metrics
        self._record = record
        self._queue: queue.Queue[Job] = queue.Queue(maxsize=queue_size)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name=f"notify-{name}", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def offer(self, job: Job) -> bool:
        """Queue ``job`` without waiting; False (counted and logged) when the queue is full."""
        try:
            self._queue.put_nowait(job)
        except queue.Full:
            self._metrics.notifications_dropped.labels(target=self.name).inc()
            log.warning("notification dropped: queue full", extra={
                "target": self.name, "ref": job.event.get("ref"), "transition": job.event.get("transition"),
                "queue_size": self._queue.maxsize})
            return False
        self._metrics.notification_queue.labels(target=self.name).set(self._queue.qsize())
        return True

    def pending(self) -> int:
        """Transitions waiting in the queue (not counting one being delivered)."""
        return self._queue.qsize()

    def request_stop(self) -> None:
        """Ask the worker to end (:meth:`stop` waits for it)."""
        self._stop.set()

    def stop(self, timeout_s: float) -> None:
        """End the worker (a back-off wait ends at once); what is still queued is dropped
        and logged."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout_s)
        left = self._queue.qsize()
        if left:
            log.warning("notifications not sent: stopping", extra={"target": self.name, "pending": left})

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                job = self._queue.get(timeout=POLL_S)
            except queue.Empty:
                continue
            self._metrics.notification_queue.labels(target=self.name).set(self._queue.qsize())
            self._deliver(job)

    def _deliver(self, job: Job) -> None:
        destination = self._destination(job)
        r = self._retry
        for attempt in range(1, r.max_attempts + 1):
            try:
                detail = self._send(job)
            except Exception as exc:  # DeliveryError, or a fault of ours: the worker goes on
                error = str(exc) if isinstance(exc, DeliveryError) else redact(f"{type(exc).__name__}: {exc}")
                last = attempt == r.max_attempts or self._stop.is_set()
                self._metrics.notification_failures.labels(target=self.name).inc()
                outcome = "gave_up" if last else "failed"
                self._record(self.name, job, destination, attempt, outcome, error)
                if last:
                    self._metrics.notifications_given_up.labels(target=self.name).inc()
                    log.warning("notification not delivered", extra={
                        "target": self.name, "ref": job.event.get("ref"), "attempts": attempt, "error": error})
                    return
                if self._stop.wait(backoff_delay(attempt, r.backoff_s, r.backoff_max_s)):
                    return
            else:
                self._metrics.notifications_delivered.labels(target=self.name).inc()
                self._record(self.name, job, destination, attempt, "delivered", detail)
                return


class Notifier:
    """The targets of ``settings`` (:class:`monitor.settings.NotificationSettings`) with
    their rules; ``store`` keeps the attempts, ``metrics`` counts them
    (:class:`monitor.metrics.ServiceMetrics`), ``location_of(machine)`` gives a machine's
    registry location (for rules by group), ``eligible(event)`` may hold a transition
    back (shelved alarms; :func:`monitor.notify.rules.not_shelved`)."""

    def __init__(self, settings: NotificationSettings, store: Store, metrics: ServiceMetrics,
                 location_of: Callable[[str], str | None],
                 eligible: Eligible = not_shelved, clock: Callable[[], dt.datetime] | None = None) -> None:
        self.settings = settings
        self._store = store
        self._location_of = location_of
        self.eligible = eligible
        self._clock = clock or (lambda: dt.datetime.now(dt.UTC))
        for secret in (settings.webhook_secret, settings.smtp_password):
            add_secret(secret)  # the log formatter masks them wherever they might appear
        retry = Retry(settings.max_attempts, settings.backoff_s, settings.backoff_max_s)
        self.channels: dict[str, Channel] = {}
        if settings.webhook_url:
            url, secret, timeout = settings.webhook_url, settings.webhook_secret, settings.timeout_s
            self.channels["webhook"] = Channel(
                "webhook", lambda job: post_event(url, event_body(job.event), secret, timeout),
                lambda _job: shown_url(url), retry, settings.queue_size, metrics, self._record)
        if settings.smtp_host:
            account = SmtpAccount(settings.smtp_host, settings.smtp_port, settings.smtp_from,
                                  settings.smtp_username, settings.smtp_password, settings.smtp_ca_file,
                                  settings.timeout_s)
            self.channels["email"] = Channel(
                "email", lambda job: self._mail(account, job), lambda job: ", ".join(job.email_to),
                retry, settings.queue_size, metrics, self._record)

    def start(self) -> None:
        for channel in self.channels.values():
            channel.start()

    def stop(self, timeout_s: float | None = None) -> None:
        """Stop the workers; each may finish the attempt under way (by default waiting up
        to one attempt's timeout and a second), which is then recorded as the last."""
        wait = self.settings.timeout_s + 1.0 if timeout_s is None else timeout_s
        for channel in self.channels.values():
            channel.request_stop()  # all at once: the waits overlap
        for channel in self.channels.values():
            channel.stop(wait)

    def submit(self, events: Iterable[Mapping[str, Any]]) -> None:
        """Queue each committed transition of ``events`` for the targets its rules name
        (never waits; the caller is the service's worker)."""
        for event in events:
            if not self.eligible(event):
                continue
            location = self._location_of(str(event.get("machine")))
            targets = targets_for(self.settings.rules, event, location)
            webhook, email = self.channels.get("webhook"), self.channels.get("email")
            if targets.webhook and webhook is not None:
                webhook.offer(Job(dict(event), location))
            if targets.email_to and email is not None:
                email.offer(Job(dict(event), location, targets.email_to))

    def _mail(self, account: SmtpAccount, job: Job) -> str:
        subject, body = mail_text(job.event, self.settings.dashboard_url, job.location)
        return send_mail(account, build_message(account, job.email_to, subject, body))

    def _record(self, target: str, job: Job, destination: str, attempt: int, outcome: str, detail: str) -> None:
        """Store one attempt; a store that fails is logged, never raised into the worker."""
        from monitor.store.deliveries import record_delivery

        e = job.event
        try:
            # A plain short transaction: the writer gate (Store.write_transaction) queues
            # processes, not the threads of one, and this insert is a few ms.
            with self._store.transaction() as s:
                record_delivery(s, alarm_id=int(e["id"]), transition=str(e.get("transition")),
                                transition_at=parse_iso_utc(str(e.get("transition_at"))),
                                target=target,
                                destination=destination, attempt=attempt, outcome=outcome, detail=detail,
                                at=self._clock())
        except Exception as exc:  # any store failure: the delivery stands, the worker goes on
            log.warning("notification attempt not recorded", extra={"ref": e.get("ref"), "error": str(exc)})
