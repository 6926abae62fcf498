"""The Sparkplug B source: limitwatch as a Sparkplug host application.

* :mod:`.proto` -- the payload schema, built in Python from the specification;
* :mod:`.host` -- births, deaths, aliases and seq per edge node (pure);
* :mod:`.settings` -- ``[[sources]]`` with ``type = "sparkplug"``;
* :mod:`.source` -- the :class:`~limitwatch.ingest.base.Source` plugin, on the MQTT source's
  connection process.
"""
