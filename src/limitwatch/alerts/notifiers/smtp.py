"""Send each notification as a plain-text e-mail through a site's mail server.

Why these choices:

* STARTTLS with certificate verification, always: a notification names plant equipment and
  readings, and the login that sends it must not cross the network in clear. There is no switch
  to turn verification off; a site with its own CA names it in ``ca_file``. With
  ``starttls = false`` (a relay on the local host) a login is refused at configuration time.
* Plain text first: it reads the same in every mail client and on a pager's mail gateway. When
  the body carries the stream's recent readings and matplotlib is installed (the ``charts``
  extra), an HTML alternative shows the same text with the X-over-MR chart as an inline PNG
  (``multipart/related``, referenced by Content-ID), so a reader sees the shift at a glance.
* ``Message-ID`` derives from the event id, so when the outbox retries after a lost answer the
  repeat carries the same id and mail systems (and people) can recognise it.
* SMTP reply codes decide retrying: 4xx is temporary by definition, 5xx is permanent. Network
  failures and unverifiable certificates are retried (nothing was sent; the server side may be
  fixed); a server that does not offer STARTTLS is not (it is the wrong server or port).

>>> subject_line({"severity": "warning", "stream": "pack-2/downtime", "rule": "beyond-limits",
...               "kind": "opened", "incident_id": 4})
'[limitwatch] New warning incident 4 on pack-2/downtime'
>>> mid = message_id("12:reminder:3", "plant.example")
>>> mid.startswith("<limitwatch.12-reminder-3."), mid.endswith("@plant.example>")
(True, True)

References
----------
RFC 5321, "Simple Mail Transfer Protocol", section 4.2.1 (reply code classes: 4yz transient,
5yz permanent); RFC 3207, "SMTP Service Extension for Secure SMTP over TLS" (STARTTLS);
RFC 5322, "Internet Message Format", section 3.6.4 (Message-ID).
"""

from __future__ import annotations

import contextlib
import hashlib
import html
import logging
import re
import smtplib
import ssl
from email.message import EmailMessage
from email.utils import formatdate, make_msgid, parseaddr
from pathlib import Path
from typing import Annotated, Any, Literal, Self

from pydantic import AfterValidator, Field, model_validator

import limitwatch
from limitwatch.alerts.messages import headline
from limitwatch.alerts.notice_chart import chart_png
from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings
from limitwatch.alerts.notifiers.console import notification_lines
from limitwatch.secrets import resolve_secret

log = logging.getLogger(__name__)


def subject_line(notification: dict[str, Any]) -> str:
    """``[limitwatch]`` and the headline: what happened to which incident, how severe."""
    return f"[limitwatch] {headline(notification)}"


def message_id(event_id: str, domain: str) -> str:
    """A Message-ID that is the same for every attempt at ``event_id``.

    Characters not allowed in a Message-ID become ``-``; a short hash of the exact event id
    keeps two ids that differ only in those characters apart.
    """
    readable = re.sub(r"[^A-Za-z0-9!#$%&'*+/=?^_`{|}~-]+", "-", event_id).strip("-") or "event"
    digest = hashlib.sha256(event_id.encode()).hexdigest()[:8]
    return f"<limitwatch.{readable}.{digest}@{domain}>"


def _address(value: str) -> str:
    _, addr = parseaddr(value)
    if "@" not in addr or addr.startswith("@") or addr.endswith("@"):
        raise ValueError(f"{value!r} is not an e-mail address")
    return value


Address = Annotated[str, AfterValidator(_address)]


class SmtpNotifier(Notifier):
    """One mail per notification to all ``recipients``, from ``sender``."""

    class Settings(NotifierSettings):
        type: Literal["smtp"] = "smtp"
        host: str = Field(min_length=1)
        port: int = Field(587, ge=1, le=65535)
        starttls: bool = True
        ca_file: Path | None = None
        username: str | None = None
        password_env: str | None = None
        password_file: Path | None = None
        sender: Address
        recipients: list[Address] = Field(min_length=1)
        timeout_s: float = Field(20.0, gt=0, le=600)

        @model_validator(mode="after")
        def _login_needs_tls(self) -> Self:
            has_password = self.password_env is not None or self.password_file is not None
            if has_password and self.username is None:
                raise ValueError("a password source is set but no username to log in with")
            if self.username is not None and not has_password:
                raise ValueError("username is set; give password_env or password_file too")
            if self.username is not None and not self.starttls:
                raise ValueError(
                    "a login needs starttls = true; limitwatch does not send passwords in clear"
                )
            return self

    def __init__(
        self,
        name: str,
        *,
        host: str,
        sender: str,
        recipients: list[str],
        port: int = 587,
        starttls: bool = True,
        ca_file: str | Path | None = None,
        username: str | None = None,
        password: str | None = None,
        timeout_s: float = 20.0,
    ) -> None:
        super().__init__(name)
        self.host, self.port, self.starttls = host, port, starttls
        self.sender, self.recipients = sender, list(recipients)
        self.username, self._password = username, password
        self.timeout_s = timeout_s
        # Verification on (CERT_REQUIRED, hostname checked): create_default_context's defaults.
        self._tls = ssl.create_default_context(cafile=ca_file) if starttls else None
        self._domain = parseaddr(sender)[1].rpartition("@")[2] or "limitwatch.invalid"

    @classmethod
    def from_settings(cls, settings: Settings) -> Self:
        password = resolve_secret(
            env=settings.password_env,
            file=settings.password_file,
            what=f"SMTP password of notifier {settings.name!r}",
        )
        return cls(
            settings.name,
            host=settings.host,
            port=settings.port,
            starttls=settings.starttls,
            ca_file=settings.ca_file,
            username=settings.username,
            password=password,
            sender=settings.sender,
            recipients=settings.recipients,
            timeout_s=settings.timeout_s,
        )

    def message(self, notification: dict[str, Any], event_id: str) -> EmailMessage:
        msg = EmailMessage()
        msg["Subject"] = subject_line(notification)
        msg["From"] = self.sender
        msg["To"] = ", ".join(self.recipients)
        msg["Date"] = formatdate(usegmt=True)
        msg["Message-ID"] = message_id(event_id, self._domain)
        msg["X-Limitwatch-Event"] = event_id
        msg["User-Agent"] = f"limitwatch/{limitwatch.__version__}"
        body = "\n".join(notification_lines({**notification, "event_id": event_id}, width=72))
        msg.set_content(body + "\n")
        png = chart_png(notification)
        if png is not None:
            cid = make_msgid(idstring="chart", domain=self._domain)
            msg.add_alternative(
                f"<html><body><pre>{html.escape(body)}</pre>"
                f'<p><img src="cid:{cid[1:-1]}" alt="XmR chart of the last readings"></p>'
                "</body></html>\n",
                subtype="html",
            )
            html_part = msg.get_body(("html",))
            assert isinstance(html_part, EmailMessage)
            html_part.add_related(png, "image", "png", cid=cid, filename="chart.png")
        return msg

    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        msg = self.message(notification, event_id)
        where = f"mail server {self.host}:{self.port} (notifier {self.name!r})"
        try:
            refused = self._send(msg)
        except smtplib.SMTPNotSupportedError as exc:
            raise DeliveryError(
                f"{where} does not offer STARTTLS, so nothing was sent: check host and port "
                f"(587 is the usual submission port) ({exc})",
                retryable=False,
            ) from exc
        except smtplib.SMTPRecipientsRefused as exc:
            codes = {code for code, _ in exc.recipients.values()}
            raise DeliveryError(
                f"{where} refused every recipient: {_refusals(exc.recipients)}",
                retryable=all(400 <= c < 500 for c in codes),
            ) from exc
        except smtplib.SMTPResponseException as exc:
            error = exc.smtp_error
            text = (
                error.decode("utf-8", "replace") if isinstance(error, bytes) else str(error or "")
            )
            raise DeliveryError(
                f"{where} answered {exc.smtp_code} {text}".rstrip(),
                retryable=400 <= exc.smtp_code < 500,
            ) from exc
        except ssl.SSLCertVerificationError as exc:
            raise DeliveryError(
                f"{where}: the server's certificate could not be verified "
                f"({exc.verify_message}); nothing was sent. Fix the server certificate or set "
                "ca_file to the CA that signed it.",
                retryable=True,
            ) from exc
        except (OSError, smtplib.SMTPException) as exc:
            raise DeliveryError(f"{where}: {exc!r}", retryable=True) from exc
        if refused:
            # Some recipients have the mail; retrying would send it to them twice.
            log.warning("%s delivered %s but refused %s", where, event_id, _refusals(refused))

    def _send(self, msg: EmailMessage) -> dict[str, tuple[int, bytes]]:
        # Not ``with SMTP(...)``: its exit sends QUIT even after a failed TLS handshake, which
        # can wait out the whole timeout on a half-open connection and hide the real error.
        client = smtplib.SMTP(self.host, self.port, timeout=self.timeout_s)
        try:
            client.ehlo()
            if self._tls is not None:
                client.starttls(context=self._tls)
                client.ehlo()
            if self.username is not None:
                client.login(self.username, self._password or "")
            refused = client.send_message(msg, from_addr=self.sender, to_addrs=self.recipients)
            # The mail was accepted; a lost goodbye changes nothing.
            with contextlib.suppress(OSError, smtplib.SMTPException):
                client.quit()
            return refused
        finally:
            client.close()


def _refusals(recipients: dict[str, tuple[int, bytes]]) -> str:
    return "; ".join(
        f"{addr}: {code} {text.decode('utf-8', 'replace')}"
        for addr, (code, text) in recipients.items()
    )
