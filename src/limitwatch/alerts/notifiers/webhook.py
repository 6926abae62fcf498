"""POST each notification as JSON to a URL, optionally signed, and classify what went wrong.

Why these choices:

* Separate connect and read timeouts: a receiver that is down should fail in seconds, one that
  is slow to answer gets longer; neither may hold the outbox worker indefinitely.
* No retry loop here. The outbox decides when to try again (exponential backoff with jitter,
  durable across restarts); this module only says whether a retry could help: 5xx, 429 and
  network failures could, other 4xx (a request the receiver will never accept) could not.
* ``X-Limitwatch-Event`` is the notification's event id, identical on every attempt, so a
  receiver that saw the first attempt succeed (but whose answer was lost) can drop the repeat.
* The optional signature lets the receiver check the body came from us and is fresh:
  ``X-Limitwatch-Signature: sha256=<hex HMAC-SHA256 over "{event_id}.{timestamp}.{body}">``
  with the shared secret; the receiver recomputes it over the raw body it got and compares in
  constant time, and rejects timestamps far from its own clock (replays).

>>> value = signature("k3y", "7:opened:0", 1700000000, b'{"a":1}')
>>> value.startswith("sha256="), len(value) - len("sha256=")  # 32 bytes, in hex
(True, 64)

References
----------
RFC 2104, "HMAC: Keyed-Hashing for Message Authentication"; FIPS 180-4 (SHA-256); RFC 9110,
"HTTP Semantics", sections 15.5 (4xx client errors) and 15.6 (5xx server errors); RFC 6585,
section 4 (429 Too Many Requests).
"""

from __future__ import annotations

import hashlib
import hmac
import http.client
import json
import ssl
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, Literal, Self
from urllib.parse import urlsplit

from pydantic import Field, field_validator

import limitwatch
from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings
from limitwatch.secrets import resolve_secret

USER_AGENT = f"limitwatch/{limitwatch.__version__}"
_RESERVED_HEADERS = {
    "content-type",
    "content-length",
    "host",
    "x-limitwatch-event",
    "x-limitwatch-timestamp",
    "x-limitwatch-signature",
}


def signature(secret: str, event_id: str, timestamp: int, body: bytes) -> str:
    """The ``X-Limitwatch-Signature`` value for one request."""
    message = f"{event_id}.{timestamp}.".encode() + body
    return "sha256=" + hmac.new(secret.encode(), message, hashlib.sha256).hexdigest()


def is_retryable_status(status: int) -> bool:
    """Server errors and "too many requests" may pass later; other refusals will not.

    >>> [is_retryable_status(s) for s in (500, 503, 429, 400, 404, 410)]
    [True, True, True, False, False, False]
    """
    return status >= 500 or status == 429


class WebhookNotifier(Notifier):
    """JSON POST over HTTP or HTTPS (certificates verified; ``ca_file`` for a site's own CA)."""

    class Settings(NotifierSettings):
        type: Literal["webhook"] = "webhook"
        url: str
        connect_timeout_s: float = Field(5.0, gt=0, le=300)
        read_timeout_s: float = Field(10.0, gt=0, le=600)
        secret_env: str | None = None
        secret_file: Path | None = None
        headers: dict[str, str] = Field(default_factory=dict)
        ca_file: Path | None = None

        @field_validator("url")
        @classmethod
        def _http_url(cls, url: str) -> str:
            parts = urlsplit(url)
            if parts.scheme not in ("http", "https") or not parts.hostname:
                raise ValueError(f"url must be an http:// or https:// URL with a host, not {url!r}")
            if parts.username or parts.password:
                raise ValueError(
                    "url must not carry credentials; receivers that need a token can take it "
                    "from the signature secret (secret_env / secret_file)"
                )
            return url

        @field_validator("headers")
        @classmethod
        def _own_headers(cls, headers: dict[str, str]) -> dict[str, str]:
            clash = sorted(h for h in headers if h.lower() in _RESERVED_HEADERS)
            if clash:
                raise ValueError(f"headers {clash} are set by limitwatch and cannot be overridden")
            return headers

    def __init__(
        self,
        name: str,
        url: str,
        *,
        connect_timeout_s: float = 5.0,
        read_timeout_s: float = 10.0,
        secret: str | None = None,
        headers: dict[str, str] | None = None,
        ca_file: str | Path | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        super().__init__(name)
        parts = urlsplit(url)
        self.url = url
        self._https = parts.scheme == "https"
        self._host = parts.hostname or ""
        self._port = parts.port or (443 if self._https else 80)
        self._path = (parts.path or "/") + (f"?{parts.query}" if parts.query else "")
        self.connect_timeout_s = connect_timeout_s
        self.read_timeout_s = read_timeout_s
        self._secret = secret
        self.headers = dict(headers or {})
        self._tls = ssl.create_default_context(cafile=ca_file) if self._https else None
        self._clock = clock

    @classmethod
    def from_settings(cls, settings: Settings) -> Self:
        secret = resolve_secret(
            env=settings.secret_env,
            file=settings.secret_file,
            what=f"signing secret of webhook notifier {settings.name!r}",
        )
        return cls(
            settings.name,
            settings.url,
            connect_timeout_s=settings.connect_timeout_s,
            read_timeout_s=settings.read_timeout_s,
            secret=secret,
            headers=settings.headers,
            ca_file=settings.ca_file,
        )

    @property
    def signs(self) -> bool:
        return self._secret is not None

    def request_headers(self, event_id: str, timestamp: int, body: bytes) -> dict[str, str]:
        headers = {
            **self.headers,
            "Content-Type": "application/json",
            "User-Agent": USER_AGENT,
            "X-Limitwatch-Event": event_id,
            "X-Limitwatch-Timestamp": str(timestamp),
        }
        if self._secret is not None:
            headers["X-Limitwatch-Signature"] = signature(self._secret, event_id, timestamp, body)
        return headers

    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        body = json.dumps(notification, separators=(",", ":"), allow_nan=False).encode()
        timestamp = int(self._clock())
        headers = self.request_headers(event_id, timestamp, body)
        conn = self._connection()
        where = f"webhook {self.name!r} ({self._host}:{self._port})"
        try:
            try:
                conn.connect()
            except TimeoutError as exc:
                raise DeliveryError(
                    f"{where}: no connection within {self.connect_timeout_s:g} s ({exc})",
                    retryable=True,
                ) from exc
            except ssl.SSLCertVerificationError as exc:
                raise DeliveryError(
                    f"{where}: the server's certificate could not be verified "
                    f"({exc.verify_message}); nothing was sent. Fix the server certificate or "
                    "set ca_file to the CA that signed it.",
                    retryable=True,
                ) from exc
            except OSError as exc:
                raise DeliveryError(f"{where}: cannot connect ({exc})", retryable=True) from exc
            assert conn.sock is not None
            conn.sock.settimeout(self.read_timeout_s)
            try:
                conn.request("POST", self._path, body=body, headers=headers)
                response = conn.getresponse()
                detail = response.read(2048).decode("utf-8", "replace").strip()
            except TimeoutError as exc:
                raise DeliveryError(
                    f"{where}: no answer within {self.read_timeout_s:g} s", retryable=True
                ) from exc
            except (OSError, http.client.HTTPException) as exc:
                raise DeliveryError(
                    f"{where}: connection failed during the request ({exc!r})", retryable=True
                ) from exc
        finally:
            conn.close()
        status = response.status
        if 200 <= status < 300:
            return
        said = f"{status} {response.reason}" + (f": {detail[:300]}" if detail else "")
        if is_retryable_status(status):
            raise DeliveryError(f"{where} answered {said}", retryable=True)
        if 300 <= status < 400:
            said += f" (redirect to {response.getheader('Location')}; configure the final URL)"
        raise DeliveryError(f"{where} refused the notification: {said}", retryable=False)

    def _connection(self) -> http.client.HTTPConnection:
        if self._https:
            return http.client.HTTPSConnection(
                self._host, self._port, timeout=self.connect_timeout_s, context=self._tls
            )
        return http.client.HTTPConnection(self._host, self._port, timeout=self.connect_timeout_s)
