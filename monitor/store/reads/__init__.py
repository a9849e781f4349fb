"""The reads of the service and the dashboard: one place for every query of stored data.

Each function runs inside the caller's session and never commits: the caller owns the
transaction (a dashboard request's session, a service unit of work). Page-level reads
issue a fixed number of statements whatever the number of machines or stored readings.
By idea:

- :mod:`~monitor.store.reads.overview`: the plant overview, a page of machines with their
  stored retained status, filtered and sorted in the database;
- :mod:`~monitor.store.reads.machines`: one machine's page, its modes, their history and
  the baseline restarts asked for;
- :mod:`~monitor.store.reads.evaluations`: what the dashboard shows of the detector's
  stored evaluations, the margin table at a machine's speed, the zone limits of a point;
- :mod:`~monitor.store.reads.trends`: decimated trends of a machine's points and of its
  running speed;
- :mod:`~monitor.store.reads.speeds`: the running speed people see (speed readings and
  accepted readings);
- :mod:`~monitor.store.reads.spectra`: stored spectra, a point's waterfall and the
  spectrum its baseline was learned from;
- :mod:`~monitor.store.reads.exports`: trends and stored spectra as tables for CSV and
  Parquet exports;
- :mod:`~monitor.store.reads.waveforms`: stored raw time waveforms;
- :mod:`~monitor.store.reads.alarms`: the alarm history, in the one JSON shape of an alarm
  (REST API and MQTT alarm events);
- :mod:`~monitor.store.reads.notifications`: the notification delivery attempts of an alarm;
- :mod:`~monitor.store.reads.out_of_service`: the periods of planned work lasting, a
  machine's recent ones;
- :mod:`~monitor.store.reads.passages`: the passages of run-ups and coast-downs, and the
  candidate modes among them;
- :mod:`~monitor.store.reads.people`: users, API tokens and the audit trail;
- :mod:`~monitor.store.reads.service`: what a starting service reads.

Callers import from this package; the names below are its whole surface.
"""

from monitor.store.reads.alarms import (
    OPEN_STATES,
    alarm_counts_by_state,
    alarm_json,
    alarms_by_id,
    find_alarms,
    get_alarm,
    machines_with_open_alarms,
    newest_alarm_with_ref,
    open_alarm_counts,
)
from monitor.store.reads.evaluations import (
    current_margins,
    evaluation_view,
    feature_json,
    margins_for,
    mode_bands,
    nearest_margin,
    point_zone_limits,
)
from monitor.store.reads.exports import (
    TREND_FEATURES,
    TooManyRows,
    check_features,
    spectrum_table,
    trend_table,
)
from monitor.store.reads.machines import (
    baseline_restart_json,
    get_machine,
    machine_detail,
    machine_list,
    machine_modes,
    mode_history,
    mode_json,
    mode_named,
    recent_baseline_restarts,
)
from monitor.store.reads.notifications import alarm_deliveries, delivery_json
from monitor.store.reads.out_of_service import (
    lasting_out_of_service,
    machine_periods,
    out_of_service_marks,
)
from monitor.store.reads.overview import (
    MAX_OVERVIEW_PAGE,
    OVERVIEW_STATES,
    SORT_KEYS,
    ZONES,
    OverviewQuery,
    machine_groups,
    overview_page,
)
from monitor.store.reads.passages import find_passages, get_passage, passage_json
from monitor.store.reads.people import (
    MAX_AUDIT_PAGE,
    active_user,
    audit_event_json,
    find_audit_events,
    get_user,
    list_api_tokens,
)
from monitor.store.reads.service import StartState, passage_tracker_state, start_state
from monitor.store.reads.spectra import (
    MAX_SPECTRUM_BINS,
    baseline_spectrum,
    bucket_peaks,
    get_spectrum,
    latest_spectra,
    newest_spectrum,
    newest_velocity_spectra,
    reading_speeds,
    spectrum_json,
    waterfall,
)
from monitor.store.reads.speeds import (
    SPEED_TOPIC,
    RunningSpeed,
    SpeedCandidate,
    health_flags,
    latest_speed_readings,
    running_speed,
)
from monitor.store.reads.trends import decimate_indices, speed_trend, trends
from monitor.store.reads.waveforms import find_waveforms, get_waveform, waveform_json

__all__ = [
    "MAX_AUDIT_PAGE",
    "active_user",
    "audit_event_json",
    "find_audit_events",
    "find_passages",
    "get_passage",
    "passage_json",
    "get_user",
    "list_api_tokens",
    "MAX_SPECTRUM_BINS",
    "OPEN_STATES",
    "StartState",
    "alarm_counts_by_state",
    "alarm_deliveries",
    "lasting_out_of_service",
    "machine_periods",
    "out_of_service_marks",
    "alarm_json",
    "delivery_json",
    "alarms_by_id",
    "baseline_restart_json",
    "current_margins",
    "decimate_indices",
    "evaluation_view",
    "feature_json",
    "find_alarms",
    "get_alarm",
    "get_machine",
    "get_spectrum",
    "latest_spectra",
    "machine_detail",
    "machine_list",
    "machine_modes",
    "MAX_OVERVIEW_PAGE",
    "OVERVIEW_STATES",
    "OverviewQuery",
    "SORT_KEYS",
    "ZONES",
    "machine_groups",
    "overview_page",
    "machines_with_open_alarms",
    "margins_for",
    "mode_bands",
    "mode_history",
    "mode_json",
    "mode_named",
    "nearest_margin",
    "newest_velocity_spectra",
    "newest_alarm_with_ref",
    "open_alarm_counts",
    "passage_tracker_state",
    "point_zone_limits",
    "recent_baseline_restarts",
    "reading_speeds",
    "spectrum_json",
    "start_state",
    "trends",
    "SPEED_TOPIC",
    "RunningSpeed",
    "SpeedCandidate",
    "health_flags",
    "latest_speed_readings",
    "running_speed",
    "speed_trend",
    "baseline_spectrum",
    "bucket_peaks",
    "newest_spectrum",
    "waterfall",
    "find_waveforms",
    "get_waveform",
    "waveform_json",
    "TREND_FEATURES",
    "TooManyRows",
    "check_features",
    "spectrum_table",
    "trend_table",
]
