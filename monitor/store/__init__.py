"""The SQL store: models, engine/session factory, the service's writes (``writes``), the
reads of the service and the dashboard (``reads``), registry import/export, retention and
migrations. See docs/store.md."""

from monitor.store.auth import (
    AuthError,
    create_api_token,
    create_user,
    hash_token,
    revoke_api_token,
    verify_api_token,
    verify_password,
)
from monitor.store.db import Store, StoreError, make_engine, normalise_url, session_factory
from monitor.store.machine_stops import MachineStop  # noqa: F401 (its table in the metadata)
from monitor.store.migrate import upgrade
from monitor.store.out_of_service import OutOfService
from monitor.store.registry_sync import export_registry, import_registry
from monitor.store.retention import RetentionPolicy, apply_retention
from monitor.store.writes import (
    acknowledge_alarm,
    add_dead_letter,
    record_transitions,
    save_detector_states,
)

__all__ = [
    "AuthError",
    "OutOfService",
    "RetentionPolicy",
    "Store",
    "StoreError",
    "acknowledge_alarm",
    "add_dead_letter",
    "apply_retention",
    "create_api_token",
    "create_user",
    "export_registry",
    "hash_token",
    "import_registry",
    "make_engine",
    "normalise_url",
    "record_transitions",
    "revoke_api_token",
    "save_detector_states",
    "session_factory",
    "upgrade",
    "verify_api_token",
    "verify_password",
]
