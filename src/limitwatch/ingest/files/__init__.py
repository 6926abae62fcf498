"""The file source: CSV and JSON-lines exports tailed by byte offset, offsets committed with
the readings they produced.

* :mod:`.tail` -- finding new complete lines in the files matching a glob;
* :mod:`.settings` -- ``[[sources]]`` with ``type = "file"``;
* :mod:`.source` -- the :class:`~limitwatch.ingest.base.Source` plugin the service runs.
"""

from limitwatch.ingest.files.tail import (
    KEPT_PREFIX,
    MAX_READ,
    FileLine,
    FileTail,
    file_identity,
    glob_folder,
)

__all__ = ["KEPT_PREFIX", "MAX_READ", "FileLine", "FileTail", "file_identity", "glob_folder"]
