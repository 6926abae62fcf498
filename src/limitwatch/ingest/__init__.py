"""Turning outside data (files, MQTT payloads) into :class:`~limitwatch.model.Reading` values."""
