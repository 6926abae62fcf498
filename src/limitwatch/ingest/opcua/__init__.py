"""The OPC UA source: limitwatch as an OPC UA client with one subscription per server.

* :mod:`.settings` -- ``[[sources]]`` with ``type = "opcua"``;
* :mod:`.values` -- what one data change means: a reading or a refusal (pure);
* :mod:`.connection` -- the asyncua client in a thread of its own, reconnecting with backoff;
* :mod:`.source` -- the :class:`~limitwatch.ingest.base.Source` plugin.
"""
