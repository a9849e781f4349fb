"""A machine with a rolling-element bearing and a seeded outer-race defect, for the
evidence-view tests (tests/test_evidence_views.py, tests/test_browser_evidence.py).

The defect is modelled from physics, not from the project's simulator: each time a
rolling element passes the defect (at BPFO, with a random slip of the element spacing)
it strikes a housing resonance that rings down as a decaying sinusoid; a 1x sinusoid and
Gaussian sensor noise are added (R. B. Randall and J. Antoni, "Rolling element bearing
diagnostics: a tutorial", MSSP 25 (2011) 485-520, sections 2-3). The geometry is that of
a 6205 deep-groove ball bearing as commonly tabulated: 9 balls of 7.94 mm on a 39.04 mm
pitch circle, contact angle 0 (from memory).
"""

from __future__ import annotations

import math
import re

import numpy as np
from dashboard_seed import PASSWORDS, ROLES
from service_helpers import message, offline_service

from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Point, Registry
from monitor.store import Store, import_registry, upgrade
from monitor.store.auth import create_user

MACHINE, POINT = "motor-b", "nde-h"
N_BALLS, BALL_MM, PITCH_MM, ANGLE_DEG = 9, 7.94, 39.04, 0.0
SHAFT_HZ = 29.5
FS_HZ, N = 25600.0, 32768
RESONANCE_HZ, RESONANCE_ZETA = 4000.0, 0.05


def bpfo_hz(shaft_hz: float = SHAFT_HZ) -> float:
    """BPFO = n fr / 2 (1 - d/D cos a) (Randall and Antoni 2011, eq. 1; T. A. Harris,
    *Rolling Bearing Analysis*, kinematics of the ball pass)."""
    return N_BALLS * shaft_hz / 2.0 * (1.0 - BALL_MM / PITCH_MM * math.cos(math.radians(ANGLE_DEG)))


def registry() -> Registry:
    return Registry(machines=(Machine(
        id=MACHINE, name="Bearing test motor", machine_class="group2/rigid",
        speed_range_rpm=(1500.0, 1800.0), excitation_orders=(1.0,),
        points=(Point(id=POINT, direction="horizontal", quantity="acceleration", unit="m/s^2", fs_hz=FS_HZ),),
        settings={"bearing_elements": N_BALLS, "bearing_ball_diameter_mm": BALL_MM,
                  "bearing_pitch_diameter_mm": PITCH_MM, "bearing_contact_angle_deg": ANGLE_DEG}),))


def outer_race_samples(seed: int, impact_m_s2: float = 8.0) -> np.ndarray:
    """One block of acceleration (m/s^2): impacts at BPFO ringing the housing resonance,
    1x of 0.5 m/s^2 and noise of 0.3 m/s^2 RMS."""
    rng = np.random.default_rng(seed)
    t = np.arange(N) / FS_HZ
    period = 1.0 / bpfo_hz()
    # 1 % random slip of each ball's spacing (Randall and Antoni 2011, section 2)
    hits = np.cumsum(period * (1.0 + 0.01 * rng.standard_normal(int(N / FS_HZ / period) + 2)))
    wd = 2 * math.pi * RESONANCE_HZ
    x = np.zeros(N)
    for th in hits[hits < t[-1]]:
        k = int(math.ceil(th * FS_HZ))
        tau = t[k:] - th
        x[k:] += impact_m_s2 * np.exp(-RESONANCE_ZETA * wd * tau) * np.sin(wd * tau)
    return x + 0.5 * np.sin(2 * math.pi * SHAFT_HZ * t) + rng.normal(0.0, 0.3, N)


def store_with_readings(url: str, end_ts: float, count: int, **settings: object) -> None:
    """The schema, the machine, the seed users, and ``count`` defect blocks a minute apart
    ending at ``end_ts``, through the service's batch path."""
    upgrade(url)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            import_registry(s, registry())
            for name, role in ROLES.items():
                create_user(s, name, PASSWORDS[name], role)
    finally:
        store.close()
    clock = {"now": 0.0}
    svc = offline_service(url, lambda: clock["now"], **settings)
    try:
        for i in range(count):
            ts = end_ts - 60.0 * (count - 1 - i)
            clock["now"] = ts
            w = Waveform(MACHINE, POINT, ts, FS_HZ, "m/s^2", outer_race_samples(i), speed_hz=SHAFT_HZ)
            svc.handle_batch([message(w)])
    finally:
        svc.store.close()


def login(client, user: str = "vic") -> None:
    """Sign ``user`` in on a Flask test client."""
    page = client.get("/login").get_data(as_text=True)
    tok = re.search(r'name="csrf-token" content="([^"]+)"', page).group(1)
    r = client.post("/login", data={"username": user, "password": PASSWORDS[user], "csrf_token": tok})
    assert r.status_code == 302, r.get_data(as_text=True)
