"""The Kafka source (a consumer-group member over a shared store) and what the MQTT -> Kafka
bridge shares with it: settings, the consumer thread, the partitioner."""
