"""A small OPC UA server for the tests: a press of the invented Quillmoor Works press hall.

Run as a subprocess by the tests (``python tests/opcua_server.py --port N ...``) on a loopback
port. Variables under ``Objects/2:Press1`` change on a schedule, one write per variable every
``--every`` seconds, each value stamped with a source time one day behind the wall clock (so
it is never in the future, and later ticks are always later, across a restart too):

==============================  ===========================================================
``ns=2;s=Press1.OilTemp``       Double, 40 + (tick mod 7) / 4
``ns=2;s=Press1.RamForce``      Double, 120 + tick mod 5; reached by browse path in the tests
``ns=2;i=5001`` (``Strokes``)   Int32, the tick
``ns=2;s=Press1.Vibration``     Double; Bad (BadSensorFailure) at the ticks in ``--bad``,
                                Uncertain (UncertainLastUsableValue) at those in ``--uncertain``
``ns=2;s=Press1.Mode``          String (not a number)
``ns=2;s=Press1.Running``       Boolean
==============================  ===========================================================

Every write is printed as one JSON line on stdout (``{"tick", "node", "value", "status",
"time"}``) so a test can compare what the service stored with what the server sent. The first
line is ``{"ready": true}``, once the server listens.

History: ``--history`` keeps every variable's changes in memory for HistoryRead (asyncua's
own history storage), from the second tick on.

Security: ``--secure`` offers only Basic256Sha256 SignAndEncrypt with ``--cert``/``--key``,
accepts only client certificates signed by a CA in ``--trusted`` (a folder), and only the user
``--user`` with the password in the environment variable ``OPCUA_TEST_PASSWORD``.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

from asyncua import Server, ua
from asyncua.crypto.permission_rules import User, UserRole
from asyncua.crypto.truststore import TrustStore
from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions

NAMESPACE = "urn:quillmoor-works:press-hall"
SERVER_URI = "urn:quillmoor-works:press-hall:server"


class OneUser:
    """Only ``name`` with ``password``."""

    def __init__(self, name: str, password: str) -> None:
        self.name = name
        self.password = password

    def get_user(self, iserver, username=None, password=None, certificate=None):
        if username == self.name and password == self.password:
            return User(role=UserRole.User)
        return None


def say(**fields) -> None:
    sys.stdout.write(json.dumps(fields) + "\n")
    sys.stdout.flush()


async def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--every", type=float, default=0.2)
    parser.add_argument("--start", type=int, default=0, help="first tick")
    parser.add_argument("--ticks", type=int, default=1_000_000, help="ticks, then keep still")
    parser.add_argument(
        "--epoch",
        type=float,
        help="source time of tick 0 (default: a day ago); tick n is "
        "stamped epoch + n * every, so a restarted server can repeat a tick exactly",
    )
    parser.add_argument("--bad", default="", help="ticks at which Vibration is Bad")
    parser.add_argument("--uncertain", default="", help="ticks at which Vibration is Uncertain")
    parser.add_argument("--secure", action="store_true")
    parser.add_argument("--history", action="store_true", help="keep history (HistoryRead)")
    parser.add_argument("--cert")
    parser.add_argument("--key")
    parser.add_argument("--trusted")
    parser.add_argument("--user")
    args = parser.parse_args()
    bad = {int(t) for t in args.bad.split(",") if t}
    uncertain = {int(t) for t in args.uncertain.split(",") if t}

    user_manager = None
    if args.user:
        user_manager = OneUser(args.user, os.environ["OPCUA_TEST_PASSWORD"])
    server = Server(user_manager=user_manager)
    await server.init()
    server.set_endpoint(f"opc.tcp://127.0.0.1:{args.port}/quillmoor/")
    server.set_server_name("Quillmoor Works press hall (test)")
    await server.set_application_uri(SERVER_URI)
    if args.secure:
        server.set_security_policy([ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt])
        await server.load_certificate(args.cert)
        await server.load_private_key(args.key)
        store = TrustStore([Path(args.trusted)], [])
        await store.load()
        server.set_certificate_validator(
            CertificateValidator(
                CertificateValidatorOptions.TIME_RANGE
                | CertificateValidatorOptions.URI
                | CertificateValidatorOptions.TRUSTED
                | CertificateValidatorOptions.PEER_CLIENT,
                store,
            )
        )
    else:
        server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
    if args.user:
        server.set_identity_tokens([ua.UserNameIdentityToken])
    ns = await server.register_namespace(NAMESPACE)
    press = await server.nodes.objects.add_object(ua.NodeId("Press1", ns), f"{ns}:Press1")
    variables = {
        "OilTemp": (ua.NodeId("Press1.OilTemp", ns), ua.VariantType.Double, 0.0),
        "RamForce": (ua.NodeId("Press1.RamForce", ns), ua.VariantType.Double, 0.0),
        "Strokes": (ua.NodeId(5001, ns), ua.VariantType.Int32, 0),
        "Vibration": (ua.NodeId("Press1.Vibration", ns), ua.VariantType.Double, 0.0),
        "Mode": (ua.NodeId("Press1.Mode", ns), ua.VariantType.String, ""),
        "Running": (ua.NodeId("Press1.Running", ns), ua.VariantType.Boolean, False),
    }
    nodes = {}
    for name, (node_id, kind, first) in variables.items():
        nodes[name] = await press.add_variable(node_id, f"{ns}:{name}", ua.Variant(first, kind))

    def values(tick: int) -> dict[str, object]:
        return {
            "OilTemp": 40.0 + (tick % 7) / 4,
            "RamForce": 120.0 + tick % 5,
            "Strokes": tick,
            "Vibration": 2.0 + (tick % 3) / 10,
            "Mode": "auto" if tick % 2 else "setup",
            "Running": bool(tick % 2),
        }

    epoch = args.epoch if args.epoch is not None else time.time() - 86_400.0

    async def write(tick: int) -> None:
        moment = round(epoch + tick * args.every, 3)  # whole milliseconds
        stamp = datetime.fromtimestamp(moment, UTC)
        for name, value in values(tick).items():
            status = ua.StatusCodes.Good
            if name == "Vibration" and tick in bad:
                status = ua.StatusCodes.BadSensorFailure
            elif name == "Vibration" and tick in uncertain:
                status = ua.StatusCodes.UncertainLastUsableValue
            node_id, kind, _ = variables[name]
            await nodes[name].write_value(
                ua.DataValue(
                    ua.Variant(value, kind),
                    StatusCode=ua.StatusCode(status),
                    SourceTimestamp=stamp,
                    ServerTimestamp=datetime.now(UTC),
                )
            )
            say(tick=tick, node=node_id.to_string(), value=value, status=status, time=moment)

    # The first tick is written before the server listens: no client ever sees the values
    # the variables were made with.
    await write(args.start)
    async with server:
        if args.history:
            await server.historize_node_data_change(list(nodes.values()), timedelta(days=7))
        say(ready=True)
        for tick in range(args.start + 1, args.start + args.ticks):
            await asyncio.sleep(args.every)
            await write(tick)
        while True:
            await asyncio.sleep(3600)


if __name__ == "__main__":
    asyncio.run(main())
