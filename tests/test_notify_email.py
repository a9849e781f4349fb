"""E-mail notifications end to end: alarm transitions of the sample motor bwm-1 (its
sensor faults; sample_streams/README.md) sent through a real SMTP server on loopback
(aiosmtpd) that demands STARTTLS (RFC 3207) with a certificate of a throwaway authority
(tests/tls_files.py) and AUTH LOGIN (RFC 4954). The message names the machine, the finding
in words, the evidence, and links to the alarm's evidence page; the SMTP password is in no
log line and no stored record."""

from __future__ import annotations

import logging

from notify_servers import MailReceiver, feed, notify_file
from service_helpers import offline_service, plant_store, traffic, wait_for
from tls_files import make_tls_files

from monitor.store import Store
from monitor.store.reads import alarm_deliveries
from monitor.wording import alarm_summary

USER = "notifier"
PASSWORD = "smtp-pass-for-tests-7c1e"  # a throwaway password for this test only
TO = "maintenance@example.test"


def motor_readings() -> list[tuple[str, bytes]]:
    return [m for m in traffic("bwm-1") if m[0].endswith("/waveform")]


def deliveries(url: str, alarm_ids: set[int]) -> list[dict]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return [d for a in sorted(alarm_ids) for d in alarm_deliveries(s, a)]
    finally:
        store.close()


def smtp_settings(port: int, ca: str) -> str:
    return (f'smtp_host = "127.0.0.1"\nsmtp_port = {port}\nsmtp_username = "{USER}"\n'
            f'smtp_from = "whirlwatch@example.test"\nsmtp_ca_file = "{ca}"\n'
            'dashboard_url = "https://cm.example.test/"\nbackoff_s = 0.05\nmax_attempts = 2\ntimeout_s = 5')


def test_mail_over_starttls_with_login(tmp_path, caplog):
    tls = make_tls_files(tmp_path / "tls")
    server = MailReceiver(tls, USER, PASSWORD)
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    cfg = notify_file(tmp_path, smtp_settings(server.port, str(tls.ca)),
                      f'kinds = ["sensor_fault"]\nemail_to = ["{TO}"]')
    caplog.set_level(logging.DEBUG)
    svc = offline_service(url, config=cfg, notifications_smtp_password=PASSWORD)
    try:
        events, _, _ = feed(svc, motor_readings())
        sent = [e for e in events if e["kind"] == "sensor_fault" and e["transition"] in ("raised", "escalated", "cleared")]
        assert sent
        assert wait_for(lambda: len(server.messages) == len(sent), 30)
        assert wait_for(lambda: len(deliveries(url, {e["id"] for e in sent})) == len(sent), 10)
    finally:
        svc.stop()
        server.close()
    # Each session logged in with AUTH LOGIN, the right password, inside TLS.
    assert server.logins and all(m == "LOGIN" and u == USER and ok and tls_on for m, u, ok, tls_on in server.logins)
    for (sender, rcpt, msg), event in zip(server.messages, sent, strict=True):
        assert sender == "whirlwatch@example.test" and rcpt == [TO]
        assert msg.get_content_type() == "text/plain"
        body = msg.get_payload(decode=True).decode("utf-8").replace("\r\n", "\n")
        assert "bwm-1" in msg["Subject"] and event["transition"] in msg["Subject"]
        assert "Machine: bwm-1 (Kestrel Lane water treatment works" in body  # its registry location
        # The finding in the words of the evidence page (monitor/wording.py).
        assert f"Finding: {alarm_summary(event['kind'], event['subject'])}\n" in body
        assert f"Alarm: {event['ref']}" in body
        assert "Evidence:\n  " in body and "none recorded" not in body
        assert f"Evidence page: https://cm.example.test/alarms/{event['id']}\n" in body
        assert "protection" in body  # alarms support judgement and the protection system
    rows = deliveries(url, {e["id"] for e in sent})
    assert {(r["target"], r["destination"], r["outcome"], r["attempt"]) for r in rows} == {("email", TO, "delivered", 1)}
    assert all(r["detail"] == f"accepted by 127.0.0.1:{server.port}" for r in rows)
    assert all(PASSWORD not in r.getMessage() and PASSWORD not in str(r.__dict__) for r in caplog.records)


def test_wrong_password_and_unknown_authority_fail_without_showing_the_password(tmp_path, caplog):
    tls = make_tls_files(tmp_path / "tls")
    server = MailReceiver(tls, USER, PASSWORD)
    wrong = "not-the-password-3b9d"
    caplog.set_level(logging.DEBUG)
    try:
        for name, ca, password, expect in (
            ("login", str(tls.ca), wrong, "SMTPAuthenticationError"),
            # A certificate from an authority the client does not trust ends the session
            # before any login is sent.
            ("authority", str(tls.other_ca), PASSWORD, "CERTIFICATE_VERIFY_FAILED"),
        ):
            (tmp_path / name).mkdir()
            url = f"sqlite:///{tmp_path / name / 'store.sqlite'}"
            plant_store(url)
            cfg = notify_file(tmp_path / name, smtp_settings(server.port, ca),
                              f'kinds = ["sensor_fault"]\nmin_severity = "alert"\ntransitions = ["raised"]\nemail_to = ["{TO}"]')
            svc = offline_service(url, config=cfg, notifications_smtp_password=password)
            try:
                events, _, _ = feed(svc, motor_readings())
                (e,) = [e for e in events if e["severity"] == "alert" and e["transition"] == "raised"]
                assert wait_for(lambda e=e, url=url: len(deliveries(url, {e["id"]})) == 2, 20)
            finally:
                svc.stop()
            rows = deliveries(url, {e["id"]})
            assert [(r["attempt"], r["outcome"]) for r in rows] == [(1, "failed"), (2, "gave_up")]
            assert all(expect in r["detail"] and password not in r["detail"] for r in rows), [r["detail"] for r in rows]
            assert all(password not in r.getMessage() and password not in str(r.__dict__) for r in caplog.records)
    finally:
        server.close()
    assert server.messages == []
    assert [ok for *_, ok, _tls in server.logins] == [False, False]  # only the wrong password got as far
