"""The parts of notifications without a network: the webhook signature against the
published HMAC-SHA256 test vectors and the verification example of docs/notifications.md,
the exponential back-off, the rules (matching, merging, errors naming the file and key),
secrets kept out of logs, and the e-mail's text for the documented alarm event."""

from __future__ import annotations

import hashlib
import hmac
import json
import re
from pathlib import Path

import pytest

from monitor.config import ConfigError, load_settings
from monitor.notify.dispatch import backoff_delay
from monitor.notify.mail import mail_text
from monitor.notify.rules import Rule, not_shelved, targets_for
from monitor.notify.signing import SIGNATURE_HEADER, signature, verify
from monitor.notify.webhook import shown_url
from monitor.redact import add_secret, redact

ROOT = Path(__file__).resolve().parent.parent
NOTIFY_DOC = (ROOT / "docs" / "notifications.md").read_text(encoding="utf-8")
ALARMS_DOC = (ROOT / "docs" / "alarms.md").read_text(encoding="utf-8")


def documented_event() -> dict:
    """The alarm event example of docs/alarms.md, "Transition and alarm JSON"."""
    section = ALARMS_DOC.split("## Transition and alarm JSON", 1)[1].split("\n## ")[0]
    (block,) = re.findall(r"```json\n(.*?)```", section, flags=re.S)
    return json.loads(block)


# RFC 4231, section 4.2 (Test Case 1) and 4.3 (Test Case 2): HMAC-SHA-256.
RFC4231 = [
    ("\x0b" * 20, b"Hi There", "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"),
    ("Jefe", b"what do ya want for nothing?", "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"),
]


@pytest.mark.parametrize(("key", "data", "digest"), RFC4231)
def test_signature_is_hmac_sha256(key, data, digest):
    assert signature(data, key) == "sha256=" + digest
    assert verify(data, key, "sha256=" + digest)
    assert not verify(data + b" ", key, "sha256=" + digest)
    assert not verify(data, key, None)


def test_the_documented_verification_accepts_our_signature():
    # The Python example of docs/notifications.md, run as a receiver would.
    (code,) = re.findall(r"```python\n(.*?)```", NOTIFY_DOC, flags=re.S)
    space: dict = {}
    exec(compile(code, "docs/notifications.md", "exec"), space)  # the doc's own example, as a receiver runs it
    body = json.dumps(documented_event()).encode()
    secret = "receiver-side-key"
    assert space["signature_ok"](body, signature(body, secret), secret)
    assert not space["signature_ok"](body.replace(b"alert", b"severe", 1), signature(body, secret), secret)
    assert not space["signature_ok"](body, None, secret)
    assert f"{SIGNATURE_HEADER}: sha256=" in NOTIFY_DOC
    # The standard library's HMAC (RFC 2104) as the reference.
    assert signature(body, secret) == "sha256=" + hmac.new(secret.encode(), body, hashlib.sha256).hexdigest()


def test_backoff_doubles_up_to_its_limit():
    # Exponential back-off: each wait twice the last, capped. # common practice
    assert [backoff_delay(n, 2.0, 30.0) for n in range(1, 7)] == [2.0, 4.0, 8.0, 16.0, 30.0, 30.0]
    assert backoff_delay(10_000, 1.0, 60.0) == 60.0
    with pytest.raises(ValueError, match="counts from 1"):
        backoff_delay(0, 1.0, 2.0)


def test_rules_match_by_machine_group_kind_severity_and_transition():
    event = documented_event()
    machine, kind, sev = event["machine"], event["kind"], event["severity"]
    assert Rule(webhook=True).matches(event, None) is (event["transition"] in ("raised", "escalated", "cleared"))
    every = ("raised", "escalated", "de-escalated", "acknowledged", "cleared")
    base = {"transitions": every, "webhook": True}
    assert Rule(machines=(machine,), **base).matches(event, None)
    assert not Rule(machines=("other",), **base).matches(event, None)
    assert Rule(machines=("other",), groups=("Hall 2",), **base).matches(event, "Hall 2")
    assert not Rule(groups=("Hall 2",), **base).matches(event, "Hall 3")
    assert Rule(kinds=(kind,), **base).matches(event, None)
    assert not Rule(kinds=("mode_shift",), **base).matches(event, None) or kind == "mode_shift"
    assert Rule(min_severity=sev, **base).matches(event, None)
    assert not Rule(min_severity="severe", **base).matches({**event, "severity": "alert"}, None)
    assert Rule(min_severity="alert", **base).matches({**event, "severity": "severe"}, None)
    assert not Rule(transitions=("cleared",), webhook=True).matches({**event, "transition": "raised"}, None)
    assert not_shelved(event)
    # ISA-18.2 / IEC 62682: a shelved alarm is not annunciated; the event of a transition
    # made while the alarm was shelved says so.
    assert not not_shelved({**event, "shelved": True, "shelved_until": "2099-01-01T00:00:00Z"})


def test_matching_rules_merge_their_targets():
    event = {**documented_event(), "transition": "raised", "severity": "alert"}
    rules = [Rule(email_to=("a@x.test", "b@x.test")), Rule(min_severity="severe", webhook=True),
             Rule(webhook=True, email_to=("b@x.test", "c@x.test"))]
    t = targets_for(rules, event, None)
    assert t.webhook and t.email_to == ("a@x.test", "b@x.test", "c@x.test")
    assert not targets_for(rules[1:2], event, None)


def test_rules_from_the_service_file(tmp_path):
    f = tmp_path / "service.toml"
    f.write_text('[notifications]\nwebhook_url = "https://hooks.example.test/a"\nsmtp_host = "smtp.example.test"\n'
                 'smtp_from = "ww@example.test"\n\n[[notifications.rule]]\ngroups = ["Hall 2"]\nwebhook = true\n\n'
                 '[[notifications.rule]]\nkinds = ["sensor_fault"]\nmin_severity = "alert"\n'
                 'email_to = ["i@example.test"]\n')
    s = load_settings(f, env={"WHIRLWATCH_NOTIFICATIONS_WEBHOOK_SECRET": "k3y-from-env"})
    n = s.notifications
    assert n.webhook_secret == "k3y-from-env" and "k3y-from-env" not in repr(n)
    assert n.rules == (Rule(groups=("Hall 2",), webhook=True),
                       Rule(kinds=("sensor_fault",), min_severity="alert", email_to=("i@example.test",)))


@pytest.mark.parametrize(("rule", "head", "words"), [
    ('kinds = ["vibration"]', "notifications.rule #1", "key 'kinds'"),
    ('min_severity = "high"\nwebhook = true', "notifications.rule #1", "key 'min_severity'"),
    ('transitions = "raised"\nwebhook = true', "notifications.rule #1", "key 'transitions'"),
    ('email_to = ["nobody"]', "notifications.rule #1", "key 'email_to'"),
    ('machine = ["ef-2"]\nwebhook = true', "notifications.rule #1", "unknown key 'machine'"),
    ('groups = ["Hall 2"]', "notifications.rule #1", "sends nowhere"),
    ("webhook = true", "notifications.rule #1", "'notifications.webhook_url' is empty"),
    ('email_to = ["i@example.test"]', "notifications.rule #1", "'notifications.smtp_host'"),
])
def test_bad_rule_is_one_sentence_naming_file_rule_and_key(tmp_path, rule, head, words):
    f = tmp_path / "service.toml"
    f.write_text(f"[[notifications.rule]]\n{rule}\n")
    with pytest.raises(ConfigError) as exc:
        load_settings(f, env={})
    text = str(exc.value)
    assert text.startswith(str(f)) and head in text and words in text and text.endswith(".")
    assert text.count(". ") == 0  # one sentence


def test_bad_notification_setting_names_the_key(tmp_path):
    f = tmp_path / "service.toml"
    f.write_text('[notifications]\nwebhook_url = "ftp://x"\n')
    with pytest.raises(ConfigError, match="key 'notifications.webhook_url' must be an http:// or https:// URL"):
        load_settings(f, env={})
    with pytest.raises(ConfigError, match="WHIRLWATCH_NOTIFICATIONS_MAX_ATTEMPTS: key 'notifications.max_attempts'"):
        load_settings(None, env={"WHIRLWATCH_NOTIFICATIONS_MAX_ATTEMPTS": "0"})


def test_secrets_are_masked_and_urls_shown_without_tokens():
    add_secret("s3cret-value-for-mask-test")
    assert redact("error: s3cret-value-for-mask-test rejected") == "error: *** rejected"
    add_secret("ab")  # too short to mask without garbling every line
    assert redact("abc") == "abc"
    assert shown_url("https://u:p@hooks.example.test:8443/x/y?token=t#f") == "https://hooks.example.test:8443/x/y"


def test_mail_text_of_the_documented_event():
    event = {**documented_event(), "transition": "raised"}
    subject, body = mail_text(event, "https://cm.example.test/", "Hall 2")
    assert event["machine"] in subject and "raised" in subject and event["severity"] in subject
    assert f"Machine: {event['machine']} (Hall 2)\n" in body
    assert f"Evidence page: https://cm.example.test/alarms/{event['id']}\n" in body
    assert "Evidence:\n  " in body
