"""One e-mail delivery: a plain-text message about an alarm transition, sent over SMTP
with STARTTLS (RFC 3207) and, when a user name is set, a login (RFC 4954).

The words are those of the dashboard's alarm pages (monitor/wording.py), so the e-mail
and the evidence page it links to say the same thing.
"""

from __future__ import annotations

import smtplib
import ssl
from collections.abc import Mapping
from dataclasses import dataclass, field
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from typing import Any

from monitor.notify.webhook import DETAIL_CHARS, DeliveryError
from monitor.redact import redact

#: Evidence rows an e-mail lists at most (the evidence page has them all).
EVIDENCE_ROWS = 12


@dataclass(frozen=True)
class SmtpAccount:
    """The SMTP server and login of the e-mails (``[notifications]`` smtp_* settings)."""

    host: str
    port: int
    sender: str
    username: str = ""
    password: str = field(default="", repr=False)
    ca_file: str = ""
    timeout_s: float = 10.0


def alarm_link(dashboard_url: str, alarm_id: Any) -> str:
    """The evidence page of alarm ``alarm_id`` on the dashboard at ``dashboard_url``."""
    return f"{dashboard_url.rstrip('/')}/alarms/{alarm_id}"


def mail_text(event: Mapping[str, Any], dashboard_url: str, location: str | None = None) -> tuple[str, str]:
    """(subject, plain-text body) of the e-mail about alarm event ``event``
    (docs/schemas/alarm-event.json): the machine, the finding in words, the transition
    and severity, an evidence summary and the link to the alarm's evidence page."""
    from monitor import wording  # the alarm pages' words

    machine = str(event.get("machine"))
    finding = wording.alarm_summary(event.get("kind"), event.get("subject"))
    severity = str(event.get("severity"))
    transition = str(event.get("transition"))
    subject = f"[whirlwatch] {severity} {transition}: {machine} – {finding}"
    where = f"{machine} ({location})" if location else machine
    lines = [
        f"Machine: {where}",
        f"Point: {event.get('point') or 'whole machine'}",
        f"Finding: {finding}",
        f"Transition: {transition} at {event.get('transition_at')}"
        + (f" (was {event['previous_severity']})" if event.get("previous_severity") else ""),
        f"Severity: {severity}; state: {event.get('state')}",
        f"Alarm: {event.get('ref')}",
        "",
        "Evidence:",
    ]
    rows = wording.evidence_rows(event.get("evidence"), str)
    lines += [f"  {r.label}: {r.value}" for r in rows[:EVIDENCE_ROWS]] or ["  none recorded"]
    if len(rows) > EVIDENCE_ROWS:
        lines.append(f"  ... and {len(rows) - EVIDENCE_ROWS} more on the evidence page")
    lines += ["", f"Evidence page: {alarm_link(dashboard_url, event.get('id'))}" if dashboard_url
              else f"Evidence page: /alarms/{event.get('id')} on the dashboard", "",
              "This alarm supports the judgement of qualified people and the machine's protection",
              "system; check it against the manufacturer's limits, local codes and licensed practice."]
    return subject, "\n".join(lines) + "\n"


def build_message(account: SmtpAccount, to: tuple[str, ...], subject: str, body: str) -> EmailMessage:
    """The RFC 5322 message: plain text, UTF-8."""
    msg = EmailMessage()
    msg["From"] = account.sender
    msg["To"] = ", ".join(to)
    msg["Subject"] = subject
    msg["Date"] = formatdate(usegmt=True)
    msg["Message-ID"] = make_msgid(domain="whirlwatch")
    msg.set_content(body)
    return msg


def send_mail(account: SmtpAccount, msg: EmailMessage) -> str:
    """Send ``msg`` through ``account``: connect, STARTTLS (server certificate verified
    against ``ca_file`` or the system store), login when a user name is set, send.
    Returns a short note of the delivery; raises :class:`DeliveryError` (without the
    password) when any step fails."""
    context = ssl.create_default_context(cafile=account.ca_file or None)
    try:
        with smtplib.SMTP(account.host, account.port, timeout=account.timeout_s) as smtp:
            smtp.starttls(context=context)
            if account.username:
                smtp.login(account.username, account.password)
            refused = smtp.send_message(msg)
    except (smtplib.SMTPException, OSError, ssl.SSLError) as exc:
        text = redact(f"SMTP {account.host}:{account.port}: {type(exc).__name__}: {exc}")
        if account.password:
            text = text.replace(account.password, "***")
        raise DeliveryError(text[:DETAIL_CHARS]) from None
    if refused:
        return f"accepted except {', '.join(sorted(refused))}"[:DETAIL_CHARS]
    return f"accepted by {account.host}:{account.port}"
