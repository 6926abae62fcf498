"""The MQTT source: a broker connection in a process of its own, acknowledgements after commit.

* :mod:`.client` -- the paho-mqtt connection (persistent session, QoS 1, manual acks);
* :mod:`.process` -- that connection in a process of its own, talking to the service by pipes;
* :mod:`.settings` -- ``[[sources]]`` with ``type = "mqtt"``;
* :mod:`.source` -- the :class:`~limitwatch.ingest.base.Source` plugin the service runs.

Only the connection's names are imported here, so the connection process does not load the
config models.
"""

from limitwatch.ingest.mqtt.client import Arrival, Delivery, MqttConnection, MqttSettings

__all__ = ["Arrival", "Delivery", "MqttConnection", "MqttSettings"]
