"""Fixtures shared by the test modules.

Fixture plugins live in their own modules next to this file; add yours with
``pytest_plugins.append("module")`` rather than assigning the list again.
"""

pytest_plugins: list[str] = []
pytest_plugins.append("broker")  # private Mosquitto: mosquitto, fresh_mosquitto (tests/broker.py)
pytest_plugins.append("fixtures_db")  # databases: database_url, store, plant (tests/fixtures_db.py)
pytest_plugins.append("registry_api")  # plant_url, api: the sample plant and its JSON API (tests/registry_api.py)


def pytest_sessionstart(session):
    # Compile the numba kernels once, before any test starts a service process with a
    # deadline: on a clean clone the first compilation takes several seconds, after which
    # every process loads them from the cache beside monitor/detection/kernels.py.
    from monitor.detection.kernels import warm_up

    warm_up()
