"""What an inbound message must satisfy: the plausibility bounds (:class:`IngestLimits`)
and the stable reasons a message is refused (:data:`REJECTION_REASONS`, :class:`Rejected`).

Payloads and reasons are documented in ``docs/mqtt.md``; a test checks that every reason
listed here is documented there.

Exceptions::

    ValueError
     +-- Rejected(reason, detail)     a message that will never be a reading
"""

from __future__ import annotations

from dataclasses import dataclass

#: Stable ids of every rejection, in the order the checks run. Documented in docs/mqtt.md.
REJECTION_REASONS: tuple[str, ...] = (
    "payload_too_large",
    "topic_prefix",
    "topic_malformed",
    "unknown_machine",
    "unknown_point",
    "not_utf8",
    "not_json",
    "not_object",
    "ts_missing",
    "ts_type",
    "ts_format",
    "ts_no_timezone",
    "ts_invalid",
    "ts_future",
    "ts_too_old",
    "ts_replayed",
    "fs_missing",
    "fs_type",
    "fs_not_finite",
    "fs_not_positive",
    "fs_absurd",
    "unit_missing",
    "unit_unknown",
    "unit_wrong_quantity",
    "samples_both",
    "samples_missing",
    "samples_type",
    "samples_not_numeric",
    "samples_not_finite",
    "samples_f32_type",
    "samples_f32_base64",
    "samples_f32_length",
    "samples_f32_not_finite",
    "samples_empty",
    "samples_too_few",
    "samples_too_many",
    "samples_absurd",
    "speed_both",
    "speed_missing",
    "speed_type",
    "speed_not_finite",
    "speed_negative",
    "speed_absurd",
    "once_per_rev_invalid",
    "id_invalid",
)


class Rejected(ValueError):
    """A message that cannot become a reading.

    ``reason`` is one of :data:`REJECTION_REASONS`; ``detail`` is one sentence for the log
    and the dead-letter record, naming the field and the offending value (shortened).
    """

    def __init__(self, reason: str, detail: str) -> None:
        if reason not in REJECTION_REASONS:
            raise ValueError(f"reason must be one of REJECTION_REASONS, got {reason!r}.")
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


@dataclass(frozen=True)
class IngestLimits:
    """Bounds that separate a plausible message from an absurd one.

    Attributes
    ----------
    max_payload_bytes : int
        Largest payload accepted, bytes (8 MiB holds 2**20 float32 samples in base64).
    min_samples, max_samples : int
        Smallest and largest waveform block, samples.
    min_fs_hz, max_fs_hz : float
        Plausible sample rates, Hz. A rate inside this range but different from the
        point's registered ``fs_hz`` passes: that is a sensor fault for sensor health.
    max_abs_sample : float
        Largest sample magnitude accepted, in the payload's unit (1e9: a thousand times
        a 10^5 g shock accelerometer's range in m/s^2, a kilometre in um). Beyond any
        sensor of the accepted units, and low enough that every spectrum of the block
        stays finite in the store's float32 (3.4e38, IEEE 754 binary32).
    max_speed_hz : float
        Highest plausible running speed, Hz (2000 Hz = 120,000 r/min). Zero is accepted:
        a stopped machine is a valid reading.
    max_future_s : float
        How far ahead of ``now`` a timestamp may be, s (clock skew between sensor and host).
    max_age_s : float
        How far behind ``now`` a timestamp may be, s (a gateway's offline buffer).
    replay_window_s : float
        A reading older than the last accepted one for the same machine and point by more
        than this, s, is a replay. Small reorderings (redelivery after a crash, several
        consumers in a shared subscription) stay inside the window; exact duplicates are
        left to the idempotent insert.
    max_id_length : int
        Longest ``id`` string, characters.
    max_once_per_rev_pulses : int
        Most once-per-revolution pulse times in one waveform (100,000: a 41 s block of
        2**20 samples at 25.6 kHz on a shaft at the 2000 Hz speed limit has 82,000).
    """

    max_payload_bytes: int = 8 * 1024 * 1024
    min_samples: int = 64
    max_samples: int = 1 << 20
    min_fs_hz: float = 1.0
    max_fs_hz: float = 1_000_000.0
    max_abs_sample: float = 1e9
    max_speed_hz: float = 2000.0
    max_future_s: float = 300.0
    max_age_s: float = 30 * 86400.0
    replay_window_s: float = 600.0
    max_id_length: int = 128
    max_once_per_rev_pulses: int = 100_000

    def __post_init__(self) -> None:
        for name in (
            "max_payload_bytes", "min_samples", "max_samples", "min_fs_hz", "max_fs_hz",
            "max_abs_sample", "max_speed_hz", "max_future_s", "max_age_s", "replay_window_s", "max_id_length",
            "max_once_per_rev_pulses",
        ):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | float) or not v >= 0:
                raise ValueError(f"{name} must be a non-negative number, got {v!r}.")
        if not 1 <= self.min_samples <= self.max_samples:
            raise ValueError(
                f"min_samples must lie in [1, max_samples={self.max_samples}], got {self.min_samples!r}."
            )
        if not 0 < self.min_fs_hz < self.max_fs_hz:
            raise ValueError(
                f"min_fs_hz must be positive and below max_fs_hz={self.max_fs_hz}, got {self.min_fs_hz!r}."
            )
