"""Real local receivers for the notifier tests: an HTTP server, an SMTP server, and test TLS
certificates made on the spot.

Nothing here imitates a notifier's client side: the HTTP server is the standard library's
``ThreadingHTTPServer``, the mail server is aiosmtpd, and the certificates are real X.509
certificates (a CA and a server certificate it signs) made with the ``cryptography`` package, so
the notifiers' TLS verification is exercised for real.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import ssl
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import NameOID

from tests.broker import free_port

# --------------------------------------------------------------------------- certificates


@dataclass(frozen=True)
class TestCA:
    """A certificate authority for one test: its certificate file and a way to sign servers."""

    cert_path: Path
    cert: x509.Certificate
    key: ec.EllipticCurvePrivateKey

    __test__ = False  # not a pytest test class

    def server_files(self, folder: Path, name: str = "server") -> tuple[Path, Path]:
        """A certificate for 127.0.0.1 / localhost signed by this CA: (cert file, key file)."""
        key = ec.generate_private_key(ec.SECP256R1())
        now = dt.datetime.now(dt.UTC)
        cert = (
            x509.CertificateBuilder()
            .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "localhost")]))
            .issuer_name(self.cert.subject)
            .public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5))
            .not_valid_after(now + dt.timedelta(days=1))
            .add_extension(
                x509.SubjectAlternativeName(
                    [x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]
                ),
                critical=False,
            )
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .add_extension(
                x509.ExtendedKeyUsage([x509.oid.ExtendedKeyUsageOID.SERVER_AUTH]), critical=False
            )
            .add_extension(
                x509.AuthorityKeyIdentifier.from_issuer_public_key(self.key.public_key()),
                critical=False,
            )
            .sign(self.key, hashes.SHA256())
        )
        cert_path, key_path = folder / f"{name}.crt", folder / f"{name}.key"
        cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
        key_path.write_bytes(
            key.private_bytes(
                serialization.Encoding.PEM,
                serialization.PrivateFormat.PKCS8,
                serialization.NoEncryption(),
            )
        )
        key_path.chmod(0o600)
        return cert_path, key_path

    def server_context(self, folder: Path, name: str = "server") -> ssl.SSLContext:
        cert_path, key_path = self.server_files(folder, name)
        ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ctx.load_cert_chain(cert_path, key_path)
        return ctx


def make_ca(folder: Path, common_name: str = "Test Plant Root CA") -> TestCA:
    folder.mkdir(parents=True, exist_ok=True)
    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, common_name)])
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(name)
        .issuer_name(name)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(minutes=5))
        .not_valid_after(now + dt.timedelta(days=2))
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                key_cert_sign=True,
                crl_sign=True,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
        .sign(key, hashes.SHA256())
    )
    path = folder / "ca.crt"
    path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    return TestCA(path, cert, key)


# --------------------------------------------------------------------------- HTTP


@dataclass
class Received:
    """One HTTP request as the receiver saw it."""

    path: str
    headers: dict[str, str]
    body: bytes
    status: int


@dataclass
class WebhookReceiver:
    """A threaded HTTP server on 127.0.0.1 answering POSTs from a script of statuses.

    ``statuses`` is consumed one per request; when it runs out every request gets ``default``.
    ``delay_s`` makes every answer late (to provoke the client's read timeout). ``on_request``
    runs (in the handler thread) before the answer is written.
    """

    statuses: list[int] = field(default_factory=list)
    default: int = 200
    delay_s: float = 0.0
    on_request: Callable[[Received], None] | None = None
    tls: ssl.SSLContext | None = None
    requests: list[Received] = field(default_factory=list)

    def __post_init__(self) -> None:
        self._lock = threading.Lock()
        self._server: ThreadingHTTPServer | None = None

    @property
    def url(self) -> str:
        assert self._server is not None
        scheme = "https" if self.tls else "http"
        return f"{scheme}://127.0.0.1:{self._server.server_address[1]}/hooks/limitwatch"

    def accepted(self) -> list[Received]:
        with self._lock:
            return [r for r in self.requests if 200 <= r.status < 300]

    def all(self) -> list[Received]:
        with self._lock:
            return list(self.requests)

    def __enter__(self) -> WebhookReceiver:
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("Content-Length", "0"))
                body = self.rfile.read(length)
                with receiver._lock:
                    status = receiver.statuses.pop(0) if receiver.statuses else receiver.default
                    got = Received(self.path, dict(self.headers.items()), body, status)
                    receiver.requests.append(got)
                if receiver.on_request is not None:
                    receiver.on_request(got)
                if receiver.delay_s:
                    time.sleep(receiver.delay_s)
                try:
                    self.send_response(status)
                    self.send_header("Content-Type", "text/plain")
                    reply = b"ok" if status < 300 else f"test receiver says {status}".encode()
                    self.send_header("Content-Length", str(len(reply)))
                    self.end_headers()
                    self.wfile.write(reply)
                except OSError:
                    pass  # the client gave up waiting (read-timeout tests)

            def log_message(self, format: str, *args: object) -> None:
                pass

        server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        server.daemon_threads = True
        if self.tls is not None:
            server.socket = self.tls.wrap_socket(server.socket, server_side=True)
        self._server = server
        threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}).start()
        return self

    def __exit__(self, *exc: object) -> None:
        assert self._server is not None
        self._server.shutdown()
        self._server.server_close()


# --------------------------------------------------------------------------- SMTP


@dataclass
class Mail:
    mail_from: str
    rcpt_tos: list[str]
    content: bytes
    tls: bool
    login: str | None


class _Collect:
    def __init__(self, refuse: dict[str, str]) -> None:
        self.mails: list[Mail] = []
        self.refuse = refuse

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        if address in self.refuse:
            return self.refuse[address]
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        login = session.auth_data.login.decode() if session.authenticated else None
        self.mails.append(
            Mail(
                envelope.mail_from,
                list(envelope.rcpt_tos),
                envelope.original_content or envelope.content,
                tls=session.ssl is not None,
                login=login,
            )
        )
        return "250 Message accepted for delivery"


@contextmanager
def smtp_receiver(
    *,
    tls: ssl.SSLContext | None = None,
    users: dict[str, str] | None = None,
    refuse: dict[str, str] | None = None,
) -> Iterator[tuple[int, list[Mail]]]:
    """An aiosmtpd server on 127.0.0.1: (port, list of received mails).

    With ``tls`` it offers STARTTLS and requires it; with ``users`` it requires a login.
    ``refuse`` maps a recipient to the reply its RCPT TO gets (e.g. ``"550 no such user"``).
    """
    handler = _Collect(refuse or {})

    def authenticator(server, session, envelope, mechanism, auth_data) -> AuthResult:
        ok = (
            isinstance(auth_data, LoginPassword)
            and users is not None
            and users.get(auth_data.login.decode()) == auth_data.password.decode()
        )
        return AuthResult(success=ok, handled=False, auth_data=auth_data)

    port = free_port()
    kwargs: dict[str, object] = {}
    if tls is not None:
        kwargs.update(tls_context=tls, require_starttls=True)
    if users is not None:
        kwargs.update(authenticator=authenticator, auth_required=True, auth_require_tls=True)
    controller = Controller(handler, hostname="127.0.0.1", port=port, ready_timeout=10, **kwargs)
    controller.start()
    try:
        yield port, handler.mails
    finally:
        controller.stop()
