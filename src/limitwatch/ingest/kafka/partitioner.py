"""Which partition a stream's readings go to: Kafka's default partitioner for keyed records.

Why the worker computes it: when the group assigns it a partition, a worker restores the
monitors of that partition's streams at once (so a silent stream is still checked for
staleness), before any reading arrives. The bridge produces with librdkafka's
``murmur2_random`` partitioner, which for a non-empty key is the Java client's
``toPositive(murmur2(key)) % partitions``; a stream seen on another partition (a producer
with another partitioner) is still taken on with its first reading.

>>> murmur2(b"21"), murmur2(b"foobar")
(-973932308, -790332482)
>>> partition_of("kiln-2/temp", 6) in range(6)
True

References
----------
Apache Kafka, ``org.apache.kafka.common.utils.Utils.murmur2`` and ``toPositive``, and its unit
test ``UtilsTest.testMurmur2`` (the two values above, from memory; the tests check this
function against librdkafka's own ``murmur2_random`` partitioner). Austin Appleby, MurmurHash2.
"""

from __future__ import annotations

_M = 0x5BD1E995
_MASK = 0xFFFFFFFF


def murmur2(data: bytes) -> int:
    """Kafka's 32-bit MurmurHash2 of ``data`` (seed 0x9747b28c), as a signed int like Java's."""
    length = len(data)
    h = (0x9747B28C ^ length) & _MASK
    end = length - length % 4
    for i in range(0, end, 4):
        k = data[i] | data[i + 1] << 8 | data[i + 2] << 16 | data[i + 3] << 24
        k = (k * _M) & _MASK
        k ^= k >> 24
        k = (k * _M) & _MASK
        h = (h * _M) & _MASK
        h ^= k
    rest = length % 4
    if rest == 3:
        h ^= data[end + 2] << 16
    if rest >= 2:
        h ^= data[end + 1] << 8
    if rest >= 1:
        h ^= data[end]
        h = (h * _M) & _MASK
    h ^= h >> 13
    h = (h * _M) & _MASK
    h ^= h >> 15
    return h - (1 << 32) if h & 0x80000000 else h


def partition_of(stream: str, partitions: int) -> int:
    """The partition a record keyed by ``stream`` goes to among ``partitions``."""
    return (murmur2(stream.encode("utf-8")) & 0x7FFFFFFF) % partitions
