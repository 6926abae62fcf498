"""Every built-in notifier against a real local receiver; the plugin registry through real entry
points.

Receivers: the standard library's HTTP server, aiosmtpd with STARTTLS and certificates made here,
a script run as a real process, and a real Mosquitto (the ``broker`` fixture). Payloads are made
by the lifecycle's own ``notification_payload`` so the notifiers see what the service sends.

Independent checks: the webhook signature is recomputed here with ``hmac``/``hashlib`` as RFC 2104
defines it; SMTP reply classes follow RFC 5321 section 4.2.1 (4yz transient, 5yz permanent); HTTP
status classes follow RFC 9110 section 15 and RFC 6585 section 4 (429).
"""

from __future__ import annotations

import email
import email.policy
import hashlib
import hmac
import io
import json
import os
import queue
import subprocess
import sys
import textwrap
import time
from datetime import UTC, datetime
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from pydantic import ValidationError

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import Notice, notification_payload
from limitwatch.alerts.messages import StreamInfo
from limitwatch.alerts.notifiers import (
    DeliveryError,
    NotifierSettings,
    UnknownNotifierError,
    build_notifier,
    known_types,
    notifier_class,
    settings_model,
)
from limitwatch.alerts.notifiers.command import CommandNotifier
from limitwatch.alerts.notifiers.console import ConsoleNotifier
from limitwatch.alerts.notifiers.mqtt import MqttNotifier
from limitwatch.alerts.notifiers.smtp import SmtpNotifier
from limitwatch.alerts.notifiers.webhook import WebhookNotifier
from limitwatch.store import Alert, Store
from tests.broker import free_port
from tests.receivers import WebhookReceiver, make_ca, smtp_receiver

T_ALERT = 1_900_000_000.0
INFO = StreamInfo("unplanned downtime, packing line 2", "min")
BUILT_INS = {
    "console": ConsoleNotifier,
    "webhook": WebhookNotifier,
    "smtp": SmtpNotifier,
    "mqtt": MqttNotifier,
    "command": CommandNotifier,
}


def payload(
    alert_id: int = 12,
    kind: str = "opened",
    number: int = 0,
    *,
    stream: str = "pack-2/downtime",
    rule: str = "beyond-limits",
    value: float = 41.5,
) -> dict:
    alert = Alert(
        id=alert_id,
        stream=stream,
        rule=rule,
        state="open",
        severity="warning",
        opened_at=T_ALERT,
        first_time=T_ALERT,
        first_index=40,
        first_value=value,
        last_time=T_ALERT,
        last_index=40,
        last_value=value,
        signal_count=1,
        quiet_count=0,
        seen_time=T_ALERT,
        signal={"chart": "x", "side": "upper", "center": 20.0, "sigma": 6.0, "ucl": 38.0,
                "lcl": 2.0, "mr": 9.0, "mr_ucl": 22.1, "baseline_version": 3},
    )  # fmt: skip
    notice = Notice(kind, number)  # type: ignore[arg-type]
    return notification_payload(alert, notice, now=T_ALERT + 60, info=INFO)


# --------------------------------------------------------------------------- registry


def test_every_built_in_is_registered_under_its_entry_point_name() -> None:
    assert set(BUILT_INS) <= set(known_types())
    for name, cls in BUILT_INS.items():
        assert notifier_class(name) is cls
        assert settings_model(name) is cls.Settings
        assert issubclass(cls.Settings, NotifierSettings)
        assert cls.__doc__ and cls.Settings.model_fields["type"].default == name


def test_every_built_in_has_its_own_tests_and_help_text() -> None:
    tests = [name for name in globals() if name.startswith("test_")]
    for name, cls in BUILT_INS.items():
        assert any(f"test_{name}_" in t for t in tests), f"no test for the {name} notifier"
        assert (sys.modules[cls.__module__].__doc__ or "").strip(), f"{name}: no module docstring"
        assert "References" in sys.modules[cls.__module__].__doc__


def test_unknown_type_lists_the_known_ones() -> None:
    with pytest.raises(UnknownNotifierError) as err:
        build_notifier({"type": "fax", "name": "old"})
    for name in BUILT_INS:
        assert name in str(err.value)
    with pytest.raises(UnknownNotifierError, match="needs a 'type'"):
        build_notifier({"name": "typeless"})


def test_bad_settings_raise_pydantic_errors_with_the_key_path() -> None:
    with pytest.raises(ValidationError) as err:
        build_notifier({"type": "webhook", "name": "w", "url": "ftp://x", "read_timeout": 3})
    locations = {e["loc"] for e in err.value.errors()}
    assert ("url",) in locations
    assert ("read_timeout",) in locations  # misspelt key: refused, not ignored
    with pytest.raises(ValidationError) as err:
        build_notifier({"type": "smtp", "name": "m", "host": "h", "sender": "lw@plant.test",
                        "recipients": ["not-an-address"]})  # fmt: skip
    assert ("recipients", 0) in {e["loc"] for e in err.value.errors()}


def test_logins_without_tls_are_refused_in_config() -> None:
    with pytest.raises(ValidationError, match="does not send passwords in clear"):
        validate = settings_model("smtp").model_validate
        validate({"type": "smtp", "name": "m", "host": "h", "sender": "a@b.test",
                  "recipients": ["c@d.test"], "starttls": False, "username": "u",
                  "password_env": "P"})  # fmt: skip
    with pytest.raises(ValidationError, match="does not send passwords in clear"):
        settings_model("mqtt").model_validate(
            {"type": "mqtt", "name": "q", "host": "h", "topic": "t", "username": "u",
             "password_env": "P"}
        )  # fmt: skip


PLUGIN = '''
import json, pathlib
from typing import Literal
from limitwatch.alerts.notifiers.base import Notifier, NotifierSettings

class PagerNotifier(Notifier):
    """Writes each notification to a file (a stand-in for a site's pager gateway)."""

    class Settings(NotifierSettings):
        type: Literal["pager"] = "pager"
        path: str

    def __init__(self, name, path):
        super().__init__(name)
        self.path = pathlib.Path(path)

    @classmethod
    def from_settings(cls, settings):
        return cls(settings.name, settings.path)

    def deliver(self, notification, *, event_id):
        self.path.write_text(json.dumps({"event_id": event_id, "stream": notification["stream"]}))

class NotANotifier:
    pass
'''

PLUGIN_CHECK = """
import json, sys
from limitwatch.alerts.notifiers import build_notifier, known_types, notifier_class
from limitwatch.alerts.notifiers.registry import NotifierPluginError
before = set(sys.modules)
pager = build_notifier({"type": "pager", "name": "pager-1", "path": sys.argv[1]})
pager.deliver({"stream": "kiln-3/temp"}, event_id="5:opened:0")
console = build_notifier({"type": "console", "name": "desk"})
try:
    notifier_class("broken")
    broken = None
except NotifierPluginError as exc:
    broken = str(exc)
print(json.dumps({
    "types": known_types(),
    "loaded": sorted(m for m in set(sys.modules) - before if m.startswith(("paho", "limitwatch"))),
    "broken": broken,
}))
"""


def test_third_party_plugin_loads_lazily_through_the_same_entry_point_group(
    tmp_path: Path,
) -> None:
    site = tmp_path / "site"
    (site / "plant_pager").mkdir(parents=True)
    (site / "plant_pager" / "__init__.py").write_text(PLUGIN)
    dist = site / "plant_pager-1.0.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: plant-pager\nVersion: 1.0\n")
    (dist / "entry_points.txt").write_text(
        "[limitwatch.notifiers]\n"
        "pager = plant_pager:PagerNotifier\n"
        "broken = plant_pager:NotANotifier\n"
    )
    out = tmp_path / "paged.json"
    env = {**os.environ, "PYTHONPATH": str(site)}
    done = subprocess.run(
        [sys.executable, "-c", PLUGIN_CHECK, str(out)],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert {"pager", "broken", *BUILT_INS} <= set(result["types"])
    assert json.loads(out.read_text()) == {"event_id": "5:opened:0", "stream": "kiln-3/temp"}
    assert "is not a subclass" in result["broken"]
    # Only what was asked for was imported: no MQTT client, no mail or webhook module.
    assert "limitwatch.alerts.notifiers.console" in result["loaded"]
    for module in (
        "paho.mqtt.client",
        "limitwatch.alerts.notifiers.mqtt",
        "limitwatch.alerts.notifiers.smtp",
        "limitwatch.alerts.notifiers.webhook",
    ):
        assert module not in result["loaded"]  # fmt: skip


# --------------------------------------------------------------------------- console


@pytest.mark.parametrize("stream", ["stdout", "stderr"])
def test_console_prints_a_readable_block(capsys: pytest.CaptureFixture[str], stream: str) -> None:
    notifier = build_notifier({"type": "console", "name": "desk", "stream": stream})
    note = payload()
    notifier.deliver(note, event_id=note["event_id"])
    captured = capsys.readouterr()
    text = captured.out if stream == "stdout" else captured.err
    assert (captured.err if stream == "stdout" else captured.out) == ""
    flat = " ".join(text.split())
    assert "New warning incident 12 on pack-2/downtime" in flat
    assert "pack-2/downtime (unplanned downtime, packing line 2)" in flat  # its description
    assert "outside the natural process limits" in flat  # the rule in words
    when = datetime.fromtimestamp(T_ALERT, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    assert f"41.5 min at {when}" in flat  # the value with its unit and its time
    assert "2 min to 38 min (natural process limits)" in flat
    assert 'limitwatch ack 12 --note "what you are doing"' in flat  # the next step
    assert "limitwatch chart pack-2/downtime" in flat
    assert "12:opened:0" not in flat  # internal ids stay in the machine body
    assert " ".join(SAFETY_CAUTION.split()) in flat
    assert all(len(line) <= 80 for line in text.splitlines())


def _console_block(capsys: pytest.CaptureFixture[str], note: dict) -> list[str]:
    build_notifier({"type": "console", "name": "desk"}).deliver(note, event_id=note["event_id"])
    return capsys.readouterr().out.splitlines()


def _with_signal(note_rule: str, value: float, **signal: object) -> dict:
    """What the lifecycle sends for an alert whose signal carries ``signal`` extras."""
    alert = Alert(
        id=12, stream="pack-2/downtime", rule=note_rule, state="open", severity="warning",
        opened_at=T_ALERT, first_time=T_ALERT, first_index=40, first_value=value,
        last_time=T_ALERT, last_index=40, last_value=value, signal_count=1, quiet_count=0,
        seen_time=T_ALERT,
        signal={"chart": "x", "side": "upper", "center": 20.0, "sigma": 6.0, "ucl": 38.0,
                "lcl": 2.0, "mr": 9.0, "mr_ucl": 22.1, "baseline_version": 3, **signal},
    )  # fmt: skip
    return notification_payload(alert, Notice("opened", 0), now=T_ALERT + 60, info=INFO)


def test_console_labels_keep_a_space_after_the_longest(capsys: pytest.CaptureFixture[str]):
    lines = _console_block(capsys, _with_signal("ewma", 31.0, statistic=0.84, limit=0.79))
    assert not any("0.84" in line or "statistic" in line for line in lines)  # jargon stays out
    labelled = [line for line in lines[1:] if line.startswith("  ") and line[2] != " "]
    starts = {len(line) - len(line.split(":", 1)[1].lstrip()) for line in labelled}
    assert len(labelled) >= 6 and len(starts) == 1  # every value in one column


def test_console_stale_block_says_how_long_in_durations(capsys: pytest.CaptureFixture[str]):
    # silent 7,512 s = 2 h 5 min 12 s; due within 2,400 s = 40 min
    lines = _console_block(capsys, _with_signal("stale", 41.5, statistic=7512.0, limit=2400.0))
    flat = " ".join(" ".join(lines).split())
    assert "silent for 2h5m12s (expected within 40m)" in flat
    assert "statistic:" not in flat and "7512" not in flat
    last = datetime.fromtimestamp(T_ALERT - 7512, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    assert f"last reading: 41.5 min at {last}" in flat  # the reading's time, not the check's
    assert " ".join(SAFETY_CAUTION.split()) in flat
    assert all(len(line) <= 80 for line in lines)


# --------------------------------------------------------------------------- webhook


def _hook(receiver: WebhookReceiver, **extra: object) -> WebhookNotifier:
    raw = {"type": "webhook", "name": "ops-hook", "url": receiver.url,
           "connect_timeout_s": 1, "read_timeout_s": 2, **extra}  # fmt: skip
    notifier = build_notifier(raw)
    assert isinstance(notifier, WebhookNotifier)
    return notifier


def test_webhook_posts_signed_json(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LW_TEST_HOOK_KEY", "line-2-shared-key")
    note = payload()
    with WebhookReceiver() as receiver:
        notifier = _hook(receiver, secret_env="LW_TEST_HOOK_KEY", headers={"X-Site": "north"})
        notifier.deliver(note, event_id="12:opened:0")
    (got,) = receiver.all()
    assert got.path == "/hooks/limitwatch"
    assert json.loads(got.body) == note
    assert got.headers["Content-Type"] == "application/json"
    assert got.headers["X-Limitwatch-Event"] == "12:opened:0"
    assert got.headers["X-Site"] == "north"
    timestamp = got.headers["X-Limitwatch-Timestamp"]
    assert abs(int(timestamp) - time.time()) < 60
    # The receiver's side of the check, written from RFC 2104 rather than with our helper.
    message = b"12:opened:0." + timestamp.encode() + b"." + got.body
    expected = hmac.new(b"line-2-shared-key", message, hashlib.sha256).hexdigest()
    assert hmac.compare_digest(got.headers["X-Limitwatch-Signature"], "sha256=" + expected)
    wrong = hmac.new(b"another-key", message, hashlib.sha256).hexdigest()
    assert got.headers["X-Limitwatch-Signature"] != "sha256=" + wrong


def test_webhook_without_secret_sends_no_signature() -> None:
    with WebhookReceiver() as receiver:
        _hook(receiver).deliver(payload(), event_id="12:opened:0")
    (got,) = receiver.all()
    assert "X-Limitwatch-Signature" not in got.headers


@pytest.mark.parametrize(
    ("status", "retryable"),
    [(500, True), (502, True), (503, True), (429, True),
     (400, False), (401, False), (404, False), (410, False), (301, False)],
)  # fmt: skip
def test_webhook_status_decides_whether_to_retry(status: int, retryable: bool) -> None:
    with WebhookReceiver(default=status) as receiver, pytest.raises(DeliveryError) as err:
        _hook(receiver).deliver(payload(), event_id="12:opened:0")
    assert err.value.retryable is retryable
    assert str(status) in str(err.value)
    assert len(receiver.all()) == 1  # no retry loop inside the notifier


def test_webhook_read_timeout_is_retryable() -> None:
    with WebhookReceiver(delay_s=1.5) as receiver:
        notifier = _hook(receiver, read_timeout_s=0.3)
        with pytest.raises(DeliveryError, match=r"no answer within 0\.3 s") as err:
            notifier.deliver(payload(), event_id="12:opened:0")
    assert err.value.retryable
    assert len(receiver.all()) == 1


def test_webhook_connection_refused_is_retryable() -> None:
    notifier = WebhookNotifier("dead", f"http://127.0.0.1:{free_port()}/x", connect_timeout_s=1)
    with pytest.raises(DeliveryError, match="cannot connect") as err:
        notifier.deliver(payload(), event_id="12:opened:0")
    assert err.value.retryable


def test_webhook_https_verifies_the_server(tmp_path: Path) -> None:
    ca = make_ca(tmp_path / "ca")
    stranger = make_ca(tmp_path / "other-ca", "Some Other CA")
    with WebhookReceiver(tls=ca.server_context(tmp_path)) as receiver:
        _hook(receiver, ca_file=ca.cert_path).deliver(payload(), event_id="12:opened:0")
        assert len(receiver.accepted()) == 1
        with pytest.raises(DeliveryError, match="certificate could not be verified"):
            _hook(receiver, ca_file=stranger.cert_path).deliver(payload(), event_id="12:opened:0")
    assert len(receiver.accepted()) == 1  # the unverified server got nothing


# --------------------------------------------------------------------------- SMTP


def _mail_settings(port: int, ca_file: Path | None, **extra: object) -> dict:
    return {"type": "smtp", "name": "shift-mail", "host": "127.0.0.1", "port": port,
            "ca_file": ca_file, "sender": "limitwatch@plant.test",
            "recipients": ["shift-lead@plant.test", "reliability@plant.test"],
            "timeout_s": 5, **extra}  # fmt: skip


def test_smtp_sends_over_verified_starttls_with_login(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ca = make_ca(tmp_path / "ca")
    monkeypatch.setenv("LW_TEST_SMTP_PW", "mail-pass-9")
    note = payload(alert_id=31, kind="reminder", number=2)
    with smtp_receiver(tls=ca.server_context(tmp_path), users={"lw": "mail-pass-9"}) as (
        port,
        mails,
    ):
        notifier = build_notifier(
            _mail_settings(port, ca.cert_path, username="lw", password_env="LW_TEST_SMTP_PW")
        )
        notifier.deliver(note, event_id="31:reminder:2")
        notifier.deliver(note, event_id="31:reminder:2")  # a retry after a lost answer
    first, again = mails
    assert first.tls and first.login == "lw"
    assert first.mail_from == "limitwatch@plant.test"
    assert first.rcpt_tos == ["shift-lead@plant.test", "reliability@plant.test"]
    msg = email.message_from_bytes(first.content, policy=email.policy.default)
    assert msg["Subject"] == (
        "[limitwatch] Reminder 2: warning incident 31 on pack-2/downtime is not acknowledged"
    )
    assert msg["X-Limitwatch-Event"] == "31:reminder:2"
    repeat = email.message_from_bytes(again.content, policy=email.policy.default)
    assert msg["Message-ID"] == repeat["Message-ID"]  # recognisable as the same mail
    assert "31" in msg["Message-ID"] and msg["Message-ID"].endswith("@plant.test>")
    body = " ".join(msg.get_content().split())
    assert "41.5 min" in body and "2 min to 38 min" in body and "center line 20 min" in body
    assert " ".join(SAFETY_CAUTION.split()) in body


HOSTILE_STREAM = "kiln-9\x1b[2J\x07/temp\nBcc: everyone@plant.test"


def test_console_escapes_control_characters_in_the_stream_id(
    capsys: pytest.CaptureFixture[str],
) -> None:
    notifier = build_notifier({"type": "console", "name": "desk"})
    notifier.deliver(payload(stream=HOSTILE_STREAM), event_id="12:opened:0")
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\x07" not in out
    escaped = "kiln-9\\x1b[2J\\x07/temp\\nBcc: everyone@plant.test"
    assert any(
        line.startswith("  stream:") and escaped in line
        for line in out.splitlines()
    ), out


def test_smtp_sends_an_alert_whose_stream_id_holds_a_newline(tmp_path: Path) -> None:
    # A newline in a header cannot be sent: every retry failed until the notification expired.
    ca = make_ca(tmp_path / "ca")
    with smtp_receiver(tls=ca.server_context(tmp_path)) as (port, mails):
        notifier = build_notifier(_mail_settings(port, ca.cert_path))
        notifier.deliver(payload(stream=HOSTILE_STREAM), event_id="12:opened:0")
    (mail,) = mails
    assert mail.rcpt_tos == ["shift-lead@plant.test", "reliability@plant.test"]
    msg = email.message_from_bytes(mail.content, policy=email.policy.default)
    assert msg["Bcc"] is None
    assert msg["Subject"] == (
        "[limitwatch] New warning incident 12 on "
        "kiln-9\\x1b[2J\\x07/temp\\nBcc: everyone@plant.test"
    )
    body = msg.get_content()
    assert "\x1b" not in body and "\x07" not in body
    assert "kiln-9\\x1b[2J\\x07/temp\\nBcc" in body


def test_smtp_refuses_a_server_certificate_from_an_unknown_ca(tmp_path: Path) -> None:
    ca = make_ca(tmp_path / "ca")
    ours = make_ca(tmp_path / "ours", "Our Plant CA")
    with smtp_receiver(tls=ca.server_context(tmp_path)) as (port, mails):
        notifier = build_notifier(_mail_settings(port, ours.cert_path))
        with pytest.raises(DeliveryError, match="certificate could not be verified"):
            notifier.deliver(payload(), event_id="12:opened:0")
        # Without ca_file the system store is used, which does not know the test CA either.
        with pytest.raises(DeliveryError, match="certificate could not be verified"):
            build_notifier(_mail_settings(port, None)).deliver(payload(), event_id="12:opened:0")
    assert mails == []


def test_smtp_will_not_send_when_starttls_is_not_offered(tmp_path: Path) -> None:
    ca = make_ca(tmp_path / "ca")
    with (
        smtp_receiver() as (port, mails),
        pytest.raises(DeliveryError, match="does not offer STARTTLS") as err,
    ):
        build_notifier(_mail_settings(port, ca.cert_path)).deliver(
            payload(), event_id="12:opened:0"
        )
    assert not err.value.retryable
    assert mails == []


def _shift_body(store: Store) -> dict:
    """What the lifecycle queues for a real shift: 30 readings stored, the last ones four sigma
    up, through the real book (which adds the recent readings to the body)."""
    from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
    from limitwatch.model import Outcome, Reading, StreamSignal

    outs = []
    for i in range(30):
        value = 20.0 + (0.0 if i < 27 else 25.0) + (i % 3 - 1) * 2.0
        t = T_ALERT + 600.0 * i
        sigs: tuple = ()
        if i >= 27:
            sigs = (
                StreamSignal("pack-2/downtime", "beyond-limits", "x", "upper", i, t, value,
                             (i,), 20.0, 6.0, 38.0, 2.0, 9.0, 22.1, 1),
            )  # fmt: skip
        phase = "learning" if i < 20 else "monitoring"
        outs.append(Outcome(Reading("pack-2/downtime", t, value), True, index=i, phase=phase,
                            z=(value - 20.0) / 6.0, mr=2.0, signals=sigs))  # fmt: skip
    policy = AlertPolicy(stream_info=lambda stream: INFO)
    with store.transaction():
        store.add_readings(outs, now=T_ALERT + 18000)
        AlertBook(store, policy).apply(outs, now=T_ALERT + 18000)
    (row,) = store.notifications()
    return row.payload


def test_smtp_mail_carries_the_xmr_chart_as_an_inline_png(fresh_db: Store, tmp_path: Path):
    from PIL import Image

    body = _shift_body(fresh_db)
    assert len(body["recent"]["value"]) == 28  # the readings up to the one that opened it
    with smtp_receiver() as (port, mails):
        notifier = build_notifier(_mail_settings(port, None, starttls=False))
        notifier.deliver(body, event_id=body["event_id"])
    (mail,) = mails
    msg = email.message_from_bytes(mail.content, policy=email.policy.default)
    plain = msg.get_body(preferencelist=("plain",))
    assert plain is not None and "43 min at" in " ".join(plain.get_content().split())
    html_part = msg.get_body(preferencelist=("html",))
    assert html_part is not None
    (image,) = [p for p in msg.walk() if p.get_content_type() == "image/png"]
    cid = image["Content-ID"].strip("<>")
    assert f'src="cid:{cid}"' in html_part.get_content()  # shown inline, by reference
    png = image.get_content()
    assert png.startswith(b"\x89PNG\r\n\x1a\n")
    picture = Image.open(io.BytesIO(png))
    picture.verify()  # a whole, decodable image
    assert picture.size == (900, 600)
    assert " ".join(SAFETY_CAUTION.split()) in " ".join(plain.get_content().split())


def test_smtp_mail_is_plain_text_when_there_are_no_readings_to_draw(tmp_path: Path) -> None:
    with smtp_receiver() as (port, mails):
        build_notifier(_mail_settings(port, None, starttls=False)).deliver(
            payload(), event_id="12:opened:0"
        )
    (mail,) = mails
    msg = email.message_from_bytes(mail.content, policy=email.policy.default)
    assert msg.get_content_type() == "text/plain"


@pytest.mark.parametrize(
    ("reply", "retryable"), [("550 5.1.1 no such mailbox", False), ("451 4.3.0 try later", True)]
)
def test_smtp_reply_class_decides_whether_to_retry(
    tmp_path: Path, reply: str, retryable: bool
) -> None:
    ca = make_ca(tmp_path / "ca")
    refuse = {"shift-lead@plant.test": reply, "reliability@plant.test": reply}
    with (
        smtp_receiver(tls=ca.server_context(tmp_path), refuse=refuse) as (port, mails),
        pytest.raises(DeliveryError, match="refused every recipient") as err,
    ):
        build_notifier(_mail_settings(port, ca.cert_path)).deliver(
            payload(), event_id="12:opened:0"
        )
    assert err.value.retryable is retryable
    assert reply.split()[0] in str(err.value)
    assert mails == []


def test_smtp_wrong_password_is_not_retried(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    ca = make_ca(tmp_path / "ca")
    monkeypatch.setenv("LW_TEST_SMTP_PW", "wrong")
    with smtp_receiver(tls=ca.server_context(tmp_path), users={"lw": "right"}) as (port, mails):
        notifier = build_notifier(
            _mail_settings(port, ca.cert_path, username="lw", password_env="LW_TEST_SMTP_PW")
        )
        with pytest.raises(DeliveryError, match="535") as err:
            notifier.deliver(payload(), event_id="12:opened:0")
    assert not err.value.retryable
    assert mails == []


# --------------------------------------------------------------------------- command


def _script(tmp_path: Path, name: str, body: str) -> Path:
    path = tmp_path / name
    path.write_text(textwrap.dedent(body).lstrip())
    path.chmod(0o755)
    return path


def test_command_gets_json_on_stdin_and_the_event_id_in_its_environment(tmp_path: Path) -> None:
    out = tmp_path / "got.json"
    script = _script(
        tmp_path,
        "page-duty.py",
        f"""
        #!{sys.executable}
        import json, os, sys
        note = json.load(sys.stdin)
        assert note["event_id"] == os.environ["LIMITWATCH_EVENT_ID"], "event id mismatch"
        with open(sys.argv[1], "w") as f:
            json.dump({{"note": note, "argv": sys.argv[1:]}}, f)
        """,
    )
    # An argument full of shell syntax must arrive verbatim: there is no shell.
    notifier = build_notifier(
        {"type": "command", "name": "pager", "argv": [str(script), str(out), "$(touch x); *"]}
    )
    note = payload(stream="kiln-3/temp; rm -rf /")
    notifier.deliver(note, event_id="12:opened:0")
    got = json.loads(out.read_text())
    assert got["argv"] == [str(out), "$(touch x); *"]
    assert got["note"] == {**note, "event_id": "12:opened:0"}
    assert not (tmp_path / "x").exists()


def test_command_gets_a_minimal_environment_not_the_services_secrets(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The service's environment holds the other notifiers' credentials; the program must not.
    monkeypatch.setenv("SMTP_PASSWORD", "hunter2")
    monkeypatch.setenv("PAGER_TOKEN", "pt-123")
    monkeypatch.setenv("LC_TIME", "C.UTF-8")
    out = tmp_path / "env.json"
    script = _script(
        tmp_path,
        "env.py",
        f"""
        #!{sys.executable}
        import json, os, sys
        sys.stdin.read()
        with open(sys.argv[1], "w") as f:
            json.dump(dict(os.environ), f)
        """,
    )
    notifier = build_notifier(
        {
            "type": "command",
            "name": "pager",
            "argv": [str(script), str(out)],
            "pass_env": ["PAGER_TOKEN", "NOT_SET_ANYWHERE"],
            "env": {"PAGER_QUEUE": "line-2"},
        }
    )
    notifier.deliver(payload(), event_id="12:opened:0")
    got = json.loads(out.read_text())
    assert "SMTP_PASSWORD" not in got
    assert "hunter2" not in got.values()
    assert got["PAGER_TOKEN"] == "pt-123"
    assert got["PAGER_QUEUE"] == "line-2"
    assert got["LC_TIME"] == "C.UTF-8"
    assert got["PATH"] == os.environ["PATH"]
    assert got["LIMITWATCH_EVENT_ID"] == "12:opened:0"
    assert "NOT_SET_ANYWHERE" not in got
    allowed = {"PATH", "HOME", "TMPDIR", "TZ", "LANG", "PAGER_TOKEN", "PAGER_QUEUE"}
    extra = {k for k in got if k not in allowed and not k.startswith("LC_")}
    # The interpreter may add a few of its own (e.g. LC_CTYPE coercion); nothing else.
    assert extra <= {"LIMITWATCH_EVENT_ID", "LC_CTYPE"}, extra


@pytest.mark.parametrize(
    ("extra", "words"),
    [
        ({"env": {"PAGER_TOKEN": "inline"}}, "pass_env"),
        ({"env": {"bad name": "x"}}, "not an environment variable name"),
        ({"pass_env": ["LIMITWATCH_EVENT_ID"]}, "set by limitwatch"),
    ],
)
def test_command_env_settings_refuse_inline_credentials_and_bad_names(extra, words) -> None:
    with pytest.raises(ValidationError, match=words):
        settings_model("command")(type="command", name="pager", argv=["/bin/true"], **extra)


def test_command_failure_is_retryable_and_reports_the_stderr_tail(tmp_path: Path) -> None:
    script = _script(
        tmp_path,
        "fails.sh",
        """
        #!/bin/sh
        cat > /dev/null
        echo "gateway said: queue full" >&2
        exit 3
        """,
    )
    with pytest.raises(DeliveryError) as err:
        CommandNotifier("pager", [str(script)], timeout_s=10).deliver(payload(), event_id="e")
    assert err.value.retryable
    assert "exited with status 3" in str(err.value)
    assert "gateway said: queue full" in str(err.value)


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except FileNotFoundError:
        return False
    return state != "Z"  # a zombie has exited; only its parent's bookkeeping remains


def test_command_timeout_kills_the_whole_process_group(tmp_path: Path) -> None:
    script = _script(
        tmp_path,
        "hangs.sh",
        f"""
        #!/bin/sh
        sleep 60 &
        echo $! > {tmp_path}/child.pid
        echo $$ > {tmp_path}/parent.pid
        sleep 60
        """,
    )
    notifier = CommandNotifier("pager", [str(script)], timeout_s=0.5)
    with pytest.raises(DeliveryError, match=r"did not finish within 0.5 s") as err:
        notifier.deliver(payload(), event_id="e")
    assert err.value.retryable
    pids = [int((tmp_path / f"{who}.pid").read_text()) for who in ("parent", "child")]
    deadline = time.monotonic() + 5
    while any(_alive(p) for p in pids) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not any(_alive(p) for p in pids), "the script or its background child survived"


def test_command_that_cannot_start_is_not_retried(tmp_path: Path) -> None:
    notifier = CommandNotifier("pager", [str(tmp_path / "no-such-program")])
    with pytest.raises(DeliveryError, match="cannot be started") as err:
        notifier.deliver(payload(), event_id="e")
    assert not err.value.retryable


# --------------------------------------------------------------------------- MQTT


class Subscriber:
    """A plain paho subscriber that collects what arrives on a topic."""

    def __init__(self, port: int, topic: str) -> None:
        self.messages: queue.Queue[mqtt.MQTTMessage] = queue.Queue()
        self._subscribed = queue.Queue[int]()
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="test-subscriber")
        self.client.on_connect = lambda c, *_: c.subscribe(topic, qos=1)
        self.client.on_subscribe = lambda *_: self._subscribed.put_nowait(1)
        self.client.on_message = lambda c, u, m: self.messages.put_nowait(m)
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        self._subscribed.get(timeout=10)

    def next_json(self) -> tuple[str, dict]:
        msg = self.messages.get(timeout=10)
        return msg.topic, json.loads(msg.payload)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def test_mqtt_publishes_the_json_and_keeps_its_connection(broker) -> None:
    sub = Subscriber(broker.port, "plant/north/alerts")
    notifier = build_notifier({"type": "mqtt", "name": "gateway", "host": "127.0.0.1",
                               "port": broker.port, "topic": "plant/north/alerts",
                               "client_id": "lw-test-notifier", "timeout_s": 5})  # fmt: skip
    assert isinstance(notifier, MqttNotifier)
    try:
        notifier.start()
        first, second = payload(alert_id=1), payload(alert_id=2, stream="kiln-3/temp")
        notifier.deliver(first, event_id="1:opened:0")
        client = notifier._client
        notifier.deliver(second, event_id="2:opened:0")
        assert notifier._client is client  # one connection for both
        assert sub.next_json() == ("plant/north/alerts", first)
        assert sub.next_json() == ("plant/north/alerts", second)
    finally:
        notifier.close()
        sub.close()


def test_mqtt_reconnects_after_the_broker_restarts(broker) -> None:
    notifier = MqttNotifier("gateway", host="127.0.0.1", port=broker.port, topic="t/a",
                            timeout_s=8)  # fmt: skip
    try:
        notifier.deliver(payload(alert_id=1), event_id="1:opened:0")
        broker.restart()
        sub = Subscriber(broker.port, "t/a")
        notifier.deliver(payload(alert_id=2), event_id="2:opened:0")
        assert sub.next_json()[1]["event_id"] == "2:opened:0"
        sub.close()
    finally:
        notifier.close()


def test_mqtt_without_a_broker_fails_retryably_within_its_timeout() -> None:
    notifier = MqttNotifier("gateway", host="127.0.0.1", port=free_port(), topic="t",
                            timeout_s=0.5)  # fmt: skip
    try:
        with pytest.raises(DeliveryError, match=r"not connected within 0\.5 s") as err:
            notifier.deliver(payload(), event_id="e")
        assert err.value.retryable
    finally:
        notifier.close()
