"""limitwatch: watch streams of individual readings with XmR charts and raise trustworthy alerts.

limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms
required by local codes, or the judgement of qualified staff.
"""

__version__ = "0.1.0"

SAFETY_CAUTION = (
    "limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, "
    "alarms required by local codes, or the judgement of qualified staff."
)

LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"
"""How ``limitwatch serve`` and its connection processes write their log lines."""
