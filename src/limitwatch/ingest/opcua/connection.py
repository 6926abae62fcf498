"""The OPC UA client: asyncua's asyncio loop in a thread of its own, feeding the intake.

Why a thread with its own loop: the worker is synchronous and must never wait on the network;
asyncua is asyncio throughout. The loop only turns data change notifications into
:class:`~limitwatch.ingest.opcua.values.Change` records and puts them on the intake queue
(``SimpleQueue.put`` never blocks); all judging happens in the worker
(:func:`~limitwatch.ingest.opcua.values.read_change`).

One session at a time, and each one from scratch: connect (security, user), resolve every item
(node ids as given, browse paths from the Objects folder, each time: a server restarted with a
new address space is followed), create one subscription with the configured publishing
interval, and one monitored item per variable with the sampling interval and queue size,
reporting every new source time stamp (trigger ``StatusValueTimestamp``), so a value equal to
the last one is still a reading. Before the subscription's values go on the intake, a new
session fills the gap from the server's history when it keeps one (``backfill``: HistoryRead
of raw values from each stream's last committed reading to the subscription's first value; the
live values are held meanwhile, and one the history gave already is dropped). The session then
lasts until asyncua's watchdog (a read of the server state every second) or the
server (a subscription status change) says it is gone, or the service stops. After a loss, and
after a failed first connection, the next attempt waits ``reconnect_min_s``, doubling up to
``reconnect_max_s``; a session that reached its subscription starts the wait again from the
least. Why not asyncua's own reconnect: it starts at a fixed second, does not retry the first
connection, and keeps browse paths resolved once; this loop is short and its outage is counted
exactly (:attr:`OpcuaConnection.restarts`, ``/health``, ``limitwatch_source_connected``).

References
----------
IEC 62541-4 (OPC UA part 4, services; section numbers of the 1.05 edition as asyncua's
generated types link them): 5.13.2 CreateSubscription (publishing interval, keep-alive and
lifetime counts), 7.21 MonitoringParameters (sampling interval, queue size, discard oldest),
7.22.2 DataChangeFilter (trigger); the StatusChangeNotification, the HistoryRead service and
re-establishing a session after a lost connection (section numbers not checked).
IEC 62541-11 (historical access) 6.5.3 ReadRawModifiedDetails.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import queue
import threading
import time
from collections.abc import Callable, Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from limitwatch.ingest.opcua.settings import OpcuaSourceConfig
from limitwatch.ingest.opcua.values import Change

__all__ = ["OpcuaConnection", "plain_time"]

log = logging.getLogger("limitwatch.opcua")

QUIET = {
    "asyncua": logging.WARNING,
    "asyncua.client.ua_client": logging.CRITICAL,
    "asyncua.client.ua_session": logging.CRITICAL,
}
"""asyncua logs each request at INFO, and a lost connection as an ERROR with a traceback from
its publish loop and a few warnings about closing what is closed; the source says the same in
one WARNING line (``connection lost: ...``). Set only where the deployment's logging set no
level of its own."""

WATCHDOG_S = 1.0
"""How often asyncua reads the server's state to notice a connection that died quietly."""


def plain_time(moment: datetime | None) -> float | None:
    """Seconds since the epoch of an OPC UA time stamp (naive ones are UTC, as on the wire);
    None for a missing one.

    >>> plain_time(datetime(2026, 1, 1, tzinfo=UTC)), plain_time(None)
    (1767225600.0, None)
    """
    if moment is None:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


def _plain_value(value: Any) -> Any:
    """A value the worker can judge without asyncua's types: numbers, text, None and lists
    stay as they are; anything else (a structure, a localized text) becomes its text."""
    if value is None or isinstance(value, (bool, int, float, str, bytes)):
        return value
    if isinstance(value, (list, tuple)):
        return list(value)
    return str(value)


def _words(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return f"{type(exc).__name__}: {text}"[:300] if text != type(exc).__name__ else text


class _Handler:
    """asyncua's subscription handler: each notification straight onto the intake."""

    def __init__(self, connection: OpcuaConnection, lost: asyncio.Event) -> None:
        self.connection = connection
        self.lost = lost

    def datachange_notification(self, node: Any, val: Any, data: Any) -> None:
        try:
            self.connection.put(data.monitored_item)
        except Exception:  # never let one notification end the session
            log.exception("opcua %s: a data change could not be read", self.connection.name)

    def status_change_notification(self, status: Any) -> None:
        code = getattr(getattr(status, "Status", None), "name", str(status))
        self.connection.last_error = f"the server ended the subscription: {code}"
        log.warning("opcua %s: %s", self.connection.name, self.connection.last_error)
        self.lost.set()


class OpcuaConnection:
    """One OPC UA source's client thread. ``connected`` and ``subscribed`` say where the
    session stands; ``restarts`` counts the sessions begun after one was lost or failed."""

    def __init__(
        self,
        config: OpcuaSourceConfig,
        password: str | None,
        intake: queue.SimpleQueue[Any],
        clock: Callable[[], float] = time.time,
        since: Callable[[], Mapping[str, float]] = dict,
    ) -> None:
        self.config = config
        self.name = config.name
        self.password = password
        self.intake = intake
        self.clock = clock
        self.streams = [config.stream_for(i) for i in range(len(config.items))]
        self.connected = threading.Event()
        self.subscribed = threading.Event()
        self.last_error: str | None = None
        self.restarts = 0
        self.sessions = 0
        self.down_since: float | None = None
        self.item_problems: dict[str, str] = {}
        """Items the server would not monitor in the current session, and why."""
        self.changes = 0
        self.since = since
        """The source time of each stream's last committed reading (what a backfill follows)."""
        self.backfilled = 0
        self.history_problems: dict[str, str] = {}
        """Items whose history could not be read at the last backfill, and why."""
        self._nodes: dict[int, Any] = {}
        self._last_put: dict[int, float] = {}
        """Item -> the source time of the last change put on the intake (this process)."""
        self._held: list[Change] | None = None
        self._filled_to: dict[int, float] = {}
        """Item -> the latest source time the last backfill put on the intake."""
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop: asyncio.Event | None = None
        self._closing = threading.Event()

    # -- the worker's side

    def start(self) -> None:
        if logging.getLogger().getEffectiveLevel() > logging.DEBUG:
            for name, level in QUIET.items():
                logger = logging.getLogger(name)
                if logger.level == logging.NOTSET:
                    logger.setLevel(level)
        self._thread = threading.Thread(target=self._run, name=f"opcua-{self.name}", daemon=True)
        self._thread.start()

    def close(self, timeout: float = 10.0) -> None:
        self._closing.set()
        loop, stop = self._loop, self._stop
        if loop is not None and stop is not None:
            with contextlib.suppress(RuntimeError):  # the loop has ended already
                loop.call_soon_threadsafe(stop.set)
        if self._thread is not None:
            self._thread.join(timeout)

    # -- the client thread

    def put(self, notification: Any) -> None:
        index = int(notification.ClientHandle) - 1
        if not 0 <= index < len(self.streams):
            return
        self.changes += 1
        change = self._change(index, notification.Value)
        self._note(change)
        if self._held is not None:
            self._held.append(change)  # until the backfill before it is on the intake
        else:
            self.intake.put(change)

    def _note(self, change: Change) -> None:
        if change.source_time is not None:
            self._last_put[change.item] = change.source_time

    def _change(self, index: int, data: Any) -> Change:
        variant = getattr(data, "Value", None)
        status = getattr(data, "StatusCode", None)
        code = int(getattr(status, "value", 0) or 0)
        name = getattr(status, "name", None) or f"0x{code:08X}"
        return Change(
            source=self.name,
            item=index,
            stream=self.streams[index],
            node=self.config.items[index].label,
            value=_plain_value(getattr(variant, "Value", None)),
            variant=getattr(getattr(variant, "VariantType", None), "name", "Null"),
            status=code,
            status_name=str(name),
            source_time=plain_time(data.SourceTimestamp),
            server_time=plain_time(data.ServerTimestamp),
            received_at=self.clock(),
        )

    def _run(self) -> None:
        try:
            asyncio.run(self._main())
        except Exception as exc:  # a bug: say so, the source shows disconnected
            self.last_error = f"the client thread ended: {_words(exc)}"
            log.exception("opcua %s: the client thread ended", self.name)

    async def _main(self) -> None:
        self._loop = asyncio.get_running_loop()
        self._stop = asyncio.Event()
        if self._closing.is_set():
            return
        config = self.config
        delay = config.reconnect_min_s
        while not self._stop.is_set():
            reached = await self._one_session()
            if self._stop.is_set():
                break
            if reached:
                delay = config.reconnect_min_s
            if self.down_since is None:
                self.down_since = self.clock()
            log.info(
                "opcua %s: connecting again in %.1f s (%s)",
                self.name,
                delay,
                self.last_error or "not connected",
            )
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._stop.wait(), timeout=delay)
            delay = min(delay * 2, config.reconnect_max_s)
            self.restarts += 1

    async def _one_session(self) -> bool:
        """Connect, subscribe and wait for the end of the session; True when it got as far
        as its subscription."""
        from asyncua import Client

        assert self._stop is not None
        config = self.config
        lost = asyncio.Event()
        client = Client(
            config.endpoint, timeout=config.request_timeout, watchdog_intervall=WATCHDOG_S
        )

        async def on_lost(exc: Exception) -> None:
            self.last_error = f"connection lost: {_words(exc)}"
            log.warning("opcua %s: %s", self.name, self.last_error)
            lost.set()

        client.connection_lost_callback = on_lost
        reached = False
        try:
            await self._secure(client)
            if config.username is not None:
                client.set_user(config.username)
                client.set_password(self.password or "")
            await client.connect()
            self.connected.set()
            self.sessions += 1
            log.info("opcua %s: connected to %s", self.name, config.endpoint)
            marks = self._marks() if config.backfill else {}
            self._held = [] if marks else None
            try:
                monitored = await self._subscribe(client, lost)
                if monitored and marks:
                    await self._backfill(marks)
            finally:
                held, self._held = self._held or [], None
                for change in held:
                    filled = self._filled_to.get(change.item)
                    moment = change.source_time
                    if filled is None or moment is None or moment > filled:
                        self.intake.put(change)  # else the history gave it already
            if monitored:
                reached = True
                self.subscribed.set()
                self.down_since = None
                log.info("opcua %s: subscribed to %d item(s)", self.name, monitored)
            else:
                self.last_error = (
                    "no item could be monitored: "
                    + "; ".join(f"{k}: {v}" for k, v in self.item_problems.items())[:500]
                )
                log.error("opcua %s: %s", self.name, self.last_error)
                return False
            stop = asyncio.ensure_future(self._stop.wait())
            gone = asyncio.ensure_future(lost.wait())
            try:
                await asyncio.wait({stop, gone}, return_when=asyncio.FIRST_COMPLETED)
            finally:
                stop.cancel()
                gone.cancel()
        except asyncio.CancelledError:
            raise
        except Exception as exc:
            self.last_error = f"{config.endpoint}: {_words(exc)}"
            log.warning("opcua %s: %s", self.name, self.last_error)
        finally:
            self.connected.clear()
            self.subscribed.clear()
            try:
                await asyncio.wait_for(
                    client.disconnect(), timeout=min(5.0, config.request_timeout)
                )
            except Exception:  # the server is gone, or the socket is: nothing left to close
                log.debug("opcua %s: disconnect after the session", self.name, exc_info=True)
        return reached

    async def _secure(self, client: Any) -> None:
        """Security policy, mode, our certificate and the server's (or its CA)."""
        security = self.config.security
        if security.policy == "None":
            return
        from asyncua import ua
        from asyncua.crypto import uacrypto
        from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256

        assert security.cert_file is not None and security.key_file is not None
        ours = await uacrypto.load_certificate(str(security.cert_file))
        uri = _application_uri(ours)
        if uri is not None:
            client.application_uri = uri  # the server checks it against our certificate
        if security.ca_file is not None:
            client.certificate_validator = await _ca_validator(security.ca_file)
        mode = getattr(ua.MessageSecurityMode, security.mode or "SignAndEncrypt")
        await client.set_security(
            SecurityPolicyBasic256Sha256,
            certificate=str(security.cert_file),
            private_key=str(security.key_file),
            server_certificate=(
                None if security.server_cert_file is None else str(security.server_cert_file)
            ),
            mode=mode,
        )

    async def _subscribe(self, client: Any, lost: asyncio.Event) -> int:
        """One subscription with a monitored item per resolvable item; how many were made."""
        from asyncua import ua

        config = self.config
        self.item_problems = {}
        self._nodes = {}
        requests = []
        for index, item in enumerate(config.items):
            try:
                if item.node is not None:
                    node = client.get_node(item.node)
                else:
                    node = await client.nodes.objects.get_child(list(item.path or ()))
            except Exception as exc:
                self.item_problems[item.label] = _words(exc)
                log.error("opcua %s: item %s: %s", self.name, item.label, _words(exc))
                continue
            request = ua.MonitoredItemCreateRequest()
            request.ItemToMonitor = ua.ReadValueId(
                NodeId=node.nodeid, AttributeId=ua.AttributeIds.Value
            )
            request.MonitoringMode = ua.MonitoringMode.Reporting
            params = ua.MonitoringParameters()
            params.ClientHandle = index + 1
            params.SamplingInterval = config.sampling_interval * 1000.0
            params.QueueSize = config.queue_size
            params.DiscardOldest = True
            # Every new sample, even one equal to the last: a moving range of 0 is information
            # an individuals chart needs (the default trigger reports changes of value only).
            params.Filter = ua.DataChangeFilter(Trigger=ua.DataChangeTrigger.StatusValueTimestamp)
            request.RequestedParameters = params
            requests.append((index, request))
            self._nodes[index] = node
        if not requests:
            return 0
        subscription = await client.create_subscription(
            config.publishing_interval * 1000.0, _Handler(self, lost)
        )
        results = await subscription.create_monitored_items([r for _, r in requests])
        made = 0
        for (index, _), result in zip(requests, results, strict=True):
            item = config.items[index]
            if isinstance(result, ua.StatusCode):
                del self._nodes[index]
                self.item_problems[item.label] = f"the server refused it: {result.name}"
                log.error(
                    "opcua %s: item %s: the server refused it: %s",
                    self.name,
                    item.label,
                    result.name,
                )
            else:
                made += 1
        return made

    def _marks(self) -> dict[int, float]:
        """Item -> the source time after which its stream has nothing: the later of its last
        committed reading (kept across restarts) and the last change put on the intake."""
        committed = self.since()
        marks = {}
        for index, stream in enumerate(self.streams):
            times = [t for t in (committed.get(stream), self._last_put.get(index)) if t is not None]
            if times:
                marks[index] = max(times)
        return marks

    async def _backfill(self, marks: Mapping[int, float]) -> None:
        """Each monitored item's values from the server's history (HistoryRead, raw) between
        its stream's last committed reading and the first value of the new subscription, put
        on the intake in order before that value. At most ``backfill_max`` back; a server or
        node without history only leaves a note in ``/health``."""
        config = self.config
        now = self.clock()
        self.history_problems = {}
        self._filled_to = {}
        found = 0
        for index, node in self._nodes.items():
            after = marks.get(index)
            if after is None:
                continue
            start = max(after, now - config.backfill_max)
            # The subscription's first value of this item, if it has come: the history ends
            # there. If it has not, the history runs to now, and a held value the history
            # also gave is dropped when the held values go on the intake.
            until = min(
                (c.source_time for c in self._held or () if c.item == index and c.source_time),
                default=now,
            )
            if until <= start:
                continue
            label = config.items[index].label
            try:
                values = await node.read_raw_history(
                    datetime.fromtimestamp(start, UTC),
                    datetime.fromtimestamp(until, UTC),
                    numvalues=0,
                    return_bounds=False,
                )
            except Exception as exc:
                self.history_problems[label] = _words(exc)
                log.info("opcua %s: no history of %s to fill the gap: %s", self.name, label,
                         _words(exc))  # fmt: skip
                continue
            for data in values:
                moment = plain_time(getattr(data, "SourceTimestamp", None))
                if moment is not None and after < moment < until:
                    change = self._change(index, data)
                    self._note(change)
                    self.intake.put(change)
                    self._filled_to[index] = max(moment, self._filled_to.get(index, moment))
                    found += 1
        if found:
            log.info("opcua %s: %d value(s) from the server's history fill the gap", self.name,
                     found)  # fmt: skip
        self.backfilled += found


def _application_uri(certificate: Any) -> str | None:
    """The URI in a certificate's subject alternative names: an OPC UA application's name."""
    from cryptography import x509

    try:
        names = certificate.extensions.get_extension_for_class(x509.SubjectAlternativeName)
    except x509.ExtensionNotFound:
        return None
    uris = names.value.get_values_for_type(x509.UniformResourceIdentifier)
    return uris[0] if uris else None


async def _ca_validator(ca_file: Any) -> Any:
    """A check that the server's certificate was signed by a CA in ``ca_file`` (PEM, one or
    more, or DER), is in its time range and names the server's application URI."""
    from asyncua import ua
    from asyncua.common.utils import ServiceError
    from asyncua.crypto.truststore import TrustStore
    from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions
    from cryptography import x509

    data = await asyncio.to_thread(Path(ca_file).read_bytes)
    authorities = (
        x509.load_pem_x509_certificates(data)
        if b"-----BEGIN" in data
        else [x509.load_der_x509_certificate(data)]
    )
    basic = CertificateValidator(
        CertificateValidatorOptions.TIME_RANGE
        | CertificateValidatorOptions.URI
        | CertificateValidatorOptions.PEER_SERVER
    )
    # asyncua's own trust store reads folders only; its policy (CA certificates need basic
    # constraints, anything goes for the end certificate) with our file's authorities
    policy = TrustStore([], []).policy_builder.store(x509.verification.Store(authorities))

    async def validate(certificate: Any, description: Any) -> None:
        await basic(certificate, description)
        try:
            policy.build_client_verifier().verify(certificate, [])
        except x509.verification.VerificationError as exc:
            log.error("opcua: the server's certificate is not signed by the CA: %s", exc)
            raise ServiceError(ua.StatusCodes.BadCertificateUntrusted) from exc

    return validate
