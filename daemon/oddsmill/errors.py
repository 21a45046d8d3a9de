"""The project's exceptions: one root, a few precise kinds.

Messages name the field and the value, so that a person can act on them.
"""

from __future__ import annotations


class OddsmillError(Exception):
    """Root of every error oddsmill raises on purpose."""


class UsageError(OddsmillError):
    """A command was asked for something it cannot do: "--top must be >= 0, got -1"."""


class ConfigError(OddsmillError, ValueError):
    """A setting is unknown or out of range: "l2 must be >= 0, got -1"."""


class ProtocolError(OddsmillError, ValueError):
    """An ingest body breaks PROTOCOL section 2.

    `reason` is one of the rejection codes of PROTOCOL section 4; `detail` is a sentence for a person;
    `event_id` is the body's id when it could be read.
    """

    def __init__(self, reason: str, detail: str, event_id: object = None) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail
        self.event_id = event_id


class CheckpointError(OddsmillError):
    """A checkpoint cannot be read: damaged, truncated, of another format or version."""


class JournalError(OddsmillError):
    """A journal segment cannot be read: wrong magic string or version."""


class InputFileError(OddsmillError):
    """A replay input cannot be read; names the file and the line."""

    def __init__(self, path: str, line: int | None, problem: str) -> None:
        where = f"{path}:{line}" if line is not None else path
        super().__init__(f"{where}: {problem}")
        self.path = path
        self.line = line
        self.problem = problem


class StateWriteError(OddsmillError):
    """The state directory refused a write that must succeed before anything is served (a warm
    start's first checkpoint)."""
