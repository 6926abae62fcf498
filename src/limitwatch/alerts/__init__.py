"""From signals to people: the alert lifecycle, the notification outbox and the notifiers.

A signal is not yet an alert. :mod:`limitwatch.alerts.lifecycle` decides when a signal opens an
alert, when repeats are folded into it, when it clears, and which notifications it owes; those
notifications are queued in the store's outbox in the same transaction and delivered after commit.
"""
