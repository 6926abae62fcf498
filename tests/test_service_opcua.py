"""The OPC UA source through the real service (`limitwatch serve`) and a real asyncua server
(tests/opcua_server.py, a subprocess on a free loopback port) whose variables change on a
schedule: readings at their source times, Bad and Uncertain values and non-numbers refused with
their reasons, a server killed and started again on the same port, and a server that takes only
Basic256Sha256 SignAndEncrypt from clients its test CA signed, with a user and password."""

from __future__ import annotations

import datetime as dt
import json
import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import rsa
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from limitwatch.children import end_process
from limitwatch.config import load_config
from tests.broker import free_port
from tests.service_harness import ServiceProcess, count, query, wait_until

pytestmark = pytest.mark.integration

SERVER = Path(__file__).with_name("opcua_server.py")
ITEMS = """
[[sources.items]]
node = "ns=2;s=Press1.OilTemp"
stream = "press-1/oil-temp"

[[sources.items]]
path = ["2:Press1", "2:RamForce"]

[[sources.items]]
node = "ns=2;i=5001"
stream = "press-1/strokes"

[[sources.items]]
node = "ns=2;s=Press1.Vibration"
stream = "press-1/vibration"

[[sources.items]]
node = "ns=2;s=Press1.Mode"

[[sources.items]]
node = "ns=2;s=Press1.Running"
"""


class OpcuaServer:
    """tests/opcua_server.py as a subprocess; what it wrote, read from its output file."""

    def __init__(self, folder: Path, port: int, *args: str, env: dict | None = None) -> None:
        self.folder = folder
        self.port = port
        self.args = args
        self.env = {**os.environ, **(env or {})}
        self.process: subprocess.Popen[bytes] | None = None
        self.runs = 0

    @property
    def endpoint(self) -> str:
        return f"opc.tcp://127.0.0.1:{self.port}/quillmoor/"

    def start(self, *more: str) -> OpcuaServer:
        self.runs += 1
        out = self.folder / f"server-{self.runs}.jsonl"
        with out.open("wb") as stdout, (self.folder / "server.err").open("ab") as stderr:
            self.process = subprocess.Popen(
                [sys.executable, str(SERVER), "--port", str(self.port), *self.args, *more],
                stdout=stdout,
                stderr=stderr,
                env=self.env,
            )
        wait_until(lambda: b'"ready"' in out.read_bytes() or self._died(), 60, "the server")
        assert self.process.poll() is None, (self.folder / "server.err").read_text()
        return self

    def _died(self) -> bool:
        return self.process is not None and self.process.poll() is not None

    def writes(self) -> list[dict]:
        found = []
        for run in range(1, self.runs + 1):
            for line in (self.folder / f"server-{run}.jsonl").read_text().splitlines():
                if line.endswith("}") and '"tick"' in line:
                    found.append(json.loads(line))
        return found

    def kill(self) -> None:
        assert self.process is not None
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(timeout=30)

    def stop(self) -> None:
        if self.process is not None:
            end_process(self.process)


def site_config(folder: Path, endpoint: str, health_port: int, extra: str = "") -> Path:
    path = folder / "site.toml"
    path.write_text(
        f"""
[store]
path = "service.db"

[service]
batch_wait = "50ms"
metrics_listen = "127.0.0.1:{health_port}"

[[sources]]
type = "opcua"
name = "hall"
endpoint = "{endpoint}"
stream = "press-1/{{name}}"
sampling_interval = "100ms"
publishing_interval = "100ms"
reconnect_min_s = 0.2
reconnect_max_s = 1
request_timeout = "5s"
{extra}
{ITEMS}
"""
    )
    return path


def get(port: int, what: str) -> str:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/{what}", timeout=5) as answer:
            return answer.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.read().decode()
    except urllib.error.URLError:
        return ""


def health(port: int) -> dict:
    text = get(port, "health")
    return json.loads(text) if text else {}


def stored(db: Path, stream: str) -> list[tuple[float, float]]:
    sql = "SELECT time, value FROM readings WHERE stream = ? ORDER BY time"
    return [(round(t, 3), v) for t, v in query(db, sql, (stream,))]


def sent(server: OpcuaServer, node: str, good_only: bool = True) -> list[tuple[float, float]]:
    return [
        (round(w["time"], 3), float(w["value"]))
        for w in server.writes()
        if w["node"] == node and (w["status"] == 0 or not good_only)
    ]


def assert_unbroken(got: list[tuple[float, float]], wrote: list[tuple[float, float]]) -> None:
    """Every value the server wrote from the first one stored to the last is stored, exactly
    once, at its source time with its value."""
    assert got, "nothing stored"
    first, last = wrote.index(got[0]), wrote.index(got[-1])
    assert got == wrote[first : last + 1]


def test_changes_refusals_and_a_server_restart_through_the_service(tmp_path):
    port, health_port = free_port(), free_port()
    epoch = str(round(time.time() - 3600.0, 3))  # within backfill_max: history is asked for
    server = OpcuaServer(
        tmp_path, port, "--every", "0.2", "--bad", "30,31", "--uncertain", "33", "--epoch", epoch
    )
    config = site_config(tmp_path, server.endpoint, health_port)
    assert load_config(config).sources[0].type == "opcua"  # what `limitwatch check` reads
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        # The service is up before the server: it keeps trying, and says so.
        wait_until(lambda: health(health_port).get("sources") == {"hall": False}, 60)
        wait_until(lambda: health(health_port).get("errors", {}).get("hall"), 30)
        server.start()
        wait_until(lambda: health(health_port).get("sources") == {"hall": True}, 30)
        wait_until(lambda: count(db, "readings", "stream = 'press-1/strokes' AND value >= 36"), 60)

        oil = sent(server, "ns=2;s=Press1.OilTemp")
        assert_unbroken(stored(db, "press-1/oil-temp"), oil)
        assert_unbroken(stored(db, "press-1/RamForce"), sent(server, "ns=2;s=Press1.RamForce"))
        assert_unbroken(stored(db, "press-1/strokes"), sent(server, "ns=2;i=5001"))
        # Vibration: the Bad and the Uncertain ticks are dead letters with the status's name
        vibration = stored(db, "press-1/vibration")
        ticks = {round(w["time"], 3): w["tick"] for w in server.writes()}
        assert ticks[vibration[0][0]] < 30 < 33 < ticks[vibration[-1][0]]
        assert_unbroken(vibration, sent(server, "ns=2;s=Press1.Vibration"))  # Good ones only
        bad = query(db, "SELECT reason, payload FROM dead_letters WHERE reason LIKE 'bad-status:%'")
        assert len(bad) == 2 and all("BadSensorFailure (0x808C0000)" in r for r, _ in bad)
        assert all("press-1/vibration" in r and b"Press1.Vibration" in p for r, p in bad)
        assert (
            count(db, "dead_letters", "reason LIKE 'uncertain-status:%UncertainLastUsable%'") == 1
        )
        # Text and Boolean values are refused as not numbers, never stored
        assert count(db, "dead_letters", "reason LIKE 'not-a-number:%Press1.Mode%String%'") > 5
        assert count(db, "dead_letters", "reason LIKE 'not-a-number:%Boolean%'") > 5
        assert (
            count(db, "readings", "stream IN ('press-1/Press1.Mode', 'press-1/Press1.Running')")
            == 0
        )
        assert count(db, "dead_letters", "reason LIKE 'duplicate:%'") == 0

        # The server dies: /health and /metrics show the outage at once.
        server.kill()
        wait_until(lambda: health(health_port).get("sources") == {"hall": False}, 30)
        down = health(health_port)
        assert down["status"] == "degraded" and down["errors"]["hall"]
        assert "down_since" in down["source_state"]["hall"]
        assert 'limitwatch_source_connected{source="hall"} 0.0' in get(health_port, "metrics")
        before = count(db, "readings", "stream = 'press-1/strokes'")
        time.sleep(1.5)  # a few reconnect attempts against a closed port
        # ... and comes back on the same port: the service resumes with a new subscription.
        server.start("--start", "1000", "--ticks", "20")
        wait_until(
            lambda: count(db, "readings", "stream = 'press-1/strokes' AND value >= 1015"), 60
        )
        up = health(health_port)
        assert up["sources"] == {"hall": True} and up["status"] == "ok"
        assert up["source_state"]["hall"]["sessions"] == 2
        assert "down_since" not in up["source_state"]["hall"]
        # this server keeps no history (it answers HistoryRead with nothing): the gap stays
        assert up["source_state"]["hall"]["backfilled"] == 0
        metrics = get(health_port, "metrics")
        assert 'limitwatch_source_connected{source="hall"} 1.0' in metrics
        restarts = [
            line
            for line in metrics.splitlines()
            if line.startswith("limitwatch_connection_restarts{")
        ]
        assert restarts and float(restarts[0].split()[-1]) >= 2
        after = [r for r in stored(db, "press-1/strokes") if r[1] >= 1000]
        assert count(db, "readings", "stream = 'press-1/strokes'") == before + len(after)
        assert_unbroken(after, [w for w in sent(server, "ns=2;i=5001") if w[1] >= 1000])
        assert_unbroken(
            [r for r in stored(db, "press-1/oil-temp") if r[0] >= after[0][0]],
            [w for w in sent(server, "ns=2;s=Press1.OilTemp") if w[0] >= after[0][0]],
        )
        # Once the server keeps still, a new session's first values are the stored ones:
        # skipped, not refused as duplicates.
        wait_until(lambda: count(db, "readings", "stream = 'press-1/strokes' AND value = 1019"), 30)
        readings = count(db, "readings")
        server.kill()
        server.start("--start", "1019", "--ticks", "1")  # tick 1019 again, to the letter
        wait_until(lambda: health(health_port).get("source_state", {}).get("hall", {})
                   .get("sessions") == 3, 30)  # fmt: skip
        wait_until(lambda: health(health_port)["source_state"]["hall"]["repeats_skipped"] >= 4, 30)
        assert count(db, "dead_letters", "reason LIKE 'duplicate:%'") == 0
        assert count(db, "readings") == readings
        assert svc.stop() == 0
        assert "Traceback" not in svc.logs()
    finally:
        if svc.alive():
            svc.kill()
        server.stop()


def test_a_service_restart_is_filled_from_the_servers_history(tmp_path):
    """While the service is down the server goes on; it keeps history, so the new session
    reads the gap back (HistoryRead) before the subscription's values: nothing is missing,
    nothing is stored twice."""
    epoch = str(round(time.time() - 3600.0, 3))  # within backfill_max (a day) of now
    server = OpcuaServer(tmp_path, free_port(), "--every", "0.1", "--history", "--epoch", epoch)
    server.start()
    health_port = free_port()
    config = site_config(tmp_path, server.endpoint, health_port)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings", "stream = 'press-1/strokes'") >= 10, 60)
        assert svc.stop() == 0
        last = max(v for _, v in stored(db, "press-1/strokes"))
        wait_until(lambda: any(w["tick"] >= last + 20 for w in server.writes()), 30)
        svc = ServiceProcess(config).start()
        wait_until(
            lambda: count(db, "readings", f"stream = 'press-1/strokes' AND value >= {last + 40}"),
            60,
        )
        strokes = stored(db, "press-1/strokes")
        assert_unbroken(strokes, sent(server, "ns=2;i=5001"))
        assert {v for _, v in strokes} >= set(range(int(last) - 5, int(last) + 40))
        assert_unbroken(stored(db, "press-1/oil-temp"), sent(server, "ns=2;s=Press1.OilTemp"))
        assert health(health_port)["source_state"]["hall"]["backfilled"] >= 4 * 20
        assert count(db, "dead_letters", "reason LIKE 'duplicate:%' OR reason LIKE 'late:%'") == 0
        assert svc.stop() == 0
    finally:
        if svc.alive():
            svc.kill()
        server.stop()


# -- Basic256Sha256 SignAndEncrypt with a test CA -----------------------------------------------


def _key() -> rsa.RSAPrivateKey:
    return rsa.generate_private_key(public_exponent=65537, key_size=2048)


def _write_key(key: rsa.RSAPrivateKey, path: Path) -> Path:
    path.write_bytes(
        key.private_bytes(
            serialization.Encoding.PEM,
            serialization.PrivateFormat.TraditionalOpenSSL,
            serialization.NoEncryption(),
        )
    )
    path.chmod(0o600)
    return path


def _write_cert(cert: x509.Certificate, path: Path) -> Path:
    path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    return path


def make_ca(name: str) -> tuple[x509.Certificate, rsa.RSAPrivateKey]:
    key = _key()
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)])
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(subject)
        .issuer_name(subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(hours=1))
        .not_valid_after(now + dt.timedelta(days=2))
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True, content_commitment=False, key_encipherment=False,
                data_encipherment=False, key_agreement=False, key_cert_sign=True,
                crl_sign=True, encipher_only=False, decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
        .sign(key, hashes.SHA256())
    )  # fmt: skip
    return cert, key


def make_cert(
    ca: tuple[x509.Certificate, rsa.RSAPrivateKey], name: str, uri: str
) -> tuple[x509.Certificate, rsa.RSAPrivateKey]:
    """An application instance certificate (IEC 62541-6 6.2.2): the application URI in the
    subject alternative names, the key usages OPC UA asks for, signed by ``ca``."""
    ca_cert, ca_key = ca
    key = _key()
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)]))
        .issuer_name(ca_cert.subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(hours=1))
        .not_valid_after(now + dt.timedelta(days=1))
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(
            x509.SubjectAlternativeName(
                [x509.UniformResourceIdentifier(uri), x509.DNSName("localhost")]
            ),
            critical=False,
        )
        .add_extension(
            x509.KeyUsage(
                digital_signature=True, content_commitment=True, key_encipherment=True,
                data_encipherment=True, key_agreement=False, key_cert_sign=False,
                crl_sign=False, encipher_only=False, decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(
            x509.ExtendedKeyUsage(
                [ExtendedKeyUsageOID.SERVER_AUTH, ExtendedKeyUsageOID.CLIENT_AUTH]
            ),
            critical=False,
        )
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()), critical=False
        )
        .sign(ca_key, hashes.SHA256())
    )  # fmt: skip
    return cert, key


def test_basic256sha256_sign_and_encrypt_with_a_test_ca_and_a_user(tmp_path):
    from tests.opcua_server import SERVER_URI

    pki = tmp_path / "pki"
    (pki / "trusted").mkdir(parents=True)
    ca = make_ca("Quillmoor Works test CA")
    _write_cert(ca[0], pki / "trusted" / "ca.pem")
    ca_file = _write_cert(ca[0], pki / "ca.pem")
    other_ca = _write_cert(make_ca("Some other CA")[0], pki / "other-ca.pem")
    server_cert, server_key = make_cert(ca, "press hall server", SERVER_URI)
    client_cert, client_key = make_cert(ca, "limitwatch", "urn:quillmoor-works:limitwatch")
    server = OpcuaServer(
        tmp_path,
        free_port(),
        "--every", "0.2", "--bad", "20",
        "--secure",
        "--cert", str(_write_cert(server_cert, pki / "server.pem")),
        "--key", str(_write_key(server_key, pki / "server-key.pem")),
        "--trusted", str(pki / "trusted"),
        "--user", "limitwatch",
        env={"OPCUA_TEST_PASSWORD": "quillmoor-s3cret"},
    )  # fmt: skip
    client_pem = _write_cert(client_cert, pki / "client.pem")
    client_key_pem = _write_key(client_key, pki / "client-key.pem")
    security = f"""
username = "limitwatch"
password_env = "HALL_OPCUA_PASSWORD"

[sources.security]
policy = "Basic256Sha256"
mode = "SignAndEncrypt"
cert_file = "{client_pem}"
key_file = "{client_key_pem}"
ca_file = "{{ca}}"
"""
    health_port = free_port()
    config = site_config(tmp_path, server.endpoint, health_port, security.format(ca=ca_file))
    # A second source on the same server that trusts another CA: it must refuse the server.
    wrong = (
        config.read_text().split("[[sources]]")[1]
        .replace('name = "hall"', 'name = "hall-other-ca"')
        .replace(str(ca_file), str(other_ca))
        .replace('stream = "press-1/{name}"', 'stream = "other/{name}"')
        .replace('stream = "press-1/', 'stream = "other/')
    )  # fmt: skip
    config.write_text(config.read_text() + "\n[[sources]]" + wrong)
    loaded = load_config(config)
    assert [s.security.mode for s in loaded.sources] == ["SignAndEncrypt"] * 2
    db = tmp_path / "service.db"
    svc = ServiceProcess(config, env={"HALL_OPCUA_PASSWORD": "quillmoor-s3cret"}).start()
    try:
        wait_until(lambda: health(health_port).get("errors", {}).get("hall"), 60)
        server.start()  # after the service, so that it sees tick 20's Bad value
        wait_until(lambda: health(health_port).get("sources", {}).get("hall"), 60)
        wait_until(lambda: count(db, "readings", "stream = 'press-1/strokes'") >= 10, 60)
        assert_unbroken(stored(db, "press-1/oil-temp"), sent(server, "ns=2;s=Press1.OilTemp"))
        wait_until(lambda: count(db, "dead_letters", "reason LIKE 'bad-status:%'") == 1, 30)
        state = health(health_port)
        assert state["sources"] == {"hall": True, "hall-other-ca": False}
        assert "BadCertificateUntrusted" in state["errors"]["hall-other-ca"], state["errors"]
        assert count(db, "readings", "stream LIKE 'other/%'") == 0
        assert svc.stop() == 0
    finally:
        if svc.alive():
            svc.kill()
        server.stop()


def test_a_wrong_password_is_refused_and_said(tmp_path):
    server = OpcuaServer(
        tmp_path, free_port(), "--user", "limitwatch", env={"OPCUA_TEST_PASSWORD": "right"}
    ).start()
    health_port = free_port()
    extra = 'username = "limitwatch"\npassword_env = "HALL_OPCUA_PASSWORD"\n'
    config = site_config(tmp_path, server.endpoint, health_port, extra)
    svc = ServiceProcess(config, env={"HALL_OPCUA_PASSWORD": "wrong"}).start()
    try:
        wait_until(lambda: health(health_port).get("errors", {}).get("hall"), 60)
        state = health(health_port)
        assert state["sources"] == {"hall": False}
        assert "BadUserAccessDenied" in state["errors"]["hall"], state["errors"]
        assert count(tmp_path / "service.db", "readings") == 0
        assert svc.stop() == 0
    finally:
        if svc.alive():
            svc.kill()
        server.stop()
