"""The worker takes a connection process's deliveries as lists (one intake put per pipe
message) and still makes batches of at most ``batch_max``, in arrival order, carrying what a
list brings past the limit over to the next batch (limitwatch.service.worker.Service._take)."""

from __future__ import annotations

import time
from pathlib import Path

from limitwatch.config import load_config
from limitwatch.ingest.mqtt import Delivery
from limitwatch.service import Service
from limitwatch.service.jobs import Job


def service(folder: Path, batch_max: int) -> Service:
    path = folder / "service.toml"
    path.write_text(
        f"""
[store]
path = "service.db"

[service]
batch_max = {batch_max}
batch_wait = "50ms"

[[sources]]
type = "mqtt"
name = "gateway"
host = "127.0.0.1"
port = 1883
client_id = "lists-test"

[[sources.topics]]
filter = "plant/+/+"
stream = "{{2}}/{{3}}"
payload = "number"
"""
    )
    return Service(load_config(path))


def deliveries(first: int, n: int) -> list[Delivery]:
    now = time.time()
    return [
        Delivery("gateway", f"plant/line-1/m{i}", b"1.5", now, i + 1, 1, False)
        for i in range(first, first + n)
    ]


def test_a_list_longer_than_batch_max_is_split_in_order_and_carried_over(tmp_path):
    svc = service(tmp_path, batch_max=3)
    svc.intake.put(deliveries(0, 7))
    svc.intake.put(deliveries(7, 1)[0])  # a single delivery, as other sources put them
    job = Job("stale-check")
    svc.intake.put(job)
    taken = [svc._take() for _ in range(3)]
    assert [[d.mid for d in batch] for batch, _ in taken] == [[1, 2, 3], [4, 5, 6], [7, 8]]
    assert [jobs for _, jobs in taken] == [[], [], [job]]
    assert svc._take() == ([], [])  # nothing left, nothing carried


def test_lists_fill_one_batch_together(tmp_path):
    svc = service(tmp_path, batch_max=500)
    for first in range(0, 40, 10):
        svc.intake.put(deliveries(first, 10))
    batch, jobs = svc._take()
    assert [d.mid for d in batch] == list(range(1, 41)) and jobs == []
