"""``[[sources]]`` with ``type = "file"``: CSV or JSON-lines exports matching a glob.

>>> source = FileSourceConfig.model_validate({
...     "type": "file", "name": "exports", "glob": "/srv/exports/*.csv", "format": "csv",
...     "value": "value", "time": "time", "stream": "stream"})
>>> source.poll_every, source.start_at
(5.0, 'beginning')
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field, ValidationInfo, field_validator, model_validator

from limitwatch.config import (
    PositiveDuration,
    SourceSettings,
    TimeFormat,
    _fail,
    _resolve_path,
)
from limitwatch.durations import format_duration
from limitwatch.ingest.fields import field_path
from limitwatch.ingest.streamid import stream_id_problem

__all__ = ["FileSourceConfig"]


class FileSourceConfig(SourceSettings):
    """``type = "file"``: CSV or JSON-lines files matching a glob, polled on an interval."""

    type: Literal["file"]
    glob: str = Field(min_length=1)
    format: Literal["csv", "jsonl"]
    poll_every: PositiveDuration = 5.0
    value: str = Field(min_length=1)
    time: str = Field(min_length=1)
    time_format: TimeFormat = "auto"
    stream: str | None = Field(None, min_length=1)
    stream_fixed: str | None = Field(None, min_length=1)
    seq: str | None = Field(None, min_length=1)
    start_at: Literal["beginning", "end"] = "beginning"

    @field_validator("glob")
    @classmethod
    def _glob(cls, value: str, info: ValidationInfo) -> str:
        return str(_resolve_path(Path(value), info))

    @field_validator("value", "time", "stream", "seq")
    @classmethod
    def _path(cls, value: str | None, info: ValidationInfo) -> str | None:
        # CSV columns are plain header names; JSON lines are read by dotted paths.
        if value is not None and info.data.get("format") == "jsonl":
            field_path(value)
        return value

    @field_validator("stream_fixed")
    @classmethod
    def _fixed(cls, value: str | None) -> str | None:
        problem = None if value is None else stream_id_problem(value)
        if problem is not None:
            raise ValueError(f"this stream id {problem}")
        return value

    @model_validator(mode="after")
    def _one_stream(self) -> FileSourceConfig:
        if (self.stream is None) == (self.stream_fixed is None):
            raise _fail(
                (
                    ("stream",),
                    "give stream (the column or field naming each row's stream) or "
                    "stream_fixed (one stream id for every row), exactly one of them",
                )
            )
        return self

    def describe(self) -> str:
        names = f"stream column {self.stream!r}" if self.stream else repr(self.stream_fixed)
        return (
            f"{self.name} (file, {self.format}): {self.glob} every "
            f"{format_duration(self.poll_every)}, {names}"
        )
