"""Replay inputs (PROTOCOL 6): JSON Lines (plain or gzip), journal segments, state directories.

`read_bodies` yields (arrival time, body, where) in order; `where` is "file:line" (or the record's
byte offset for journals) so that a bad body can be reported precisely. A file that cannot be read
as a whole raises InputFileError naming it.
"""

from __future__ import annotations

import gzip
import json
import logging
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from .errors import InputFileError, JournalError
from .storage import is_journal, list_journal, read_journal, segment_first

log = logging.getLogger("oddsmill")


def read_bodies(paths: list[str]) -> Iterator[tuple[float, Any, str]]:
    for name in paths:
        path = Path(name)
        if path.is_dir():
            segments = list_journal(path)
            if not segments:
                raise InputFileError(name, None, "a directory with no journal segments")
            if segment_first(segments[0]) > 0:
                log.warning(
                    "%s: its journal starts at record %d (the segments before were retired by --journal-keep, "
                    "or removed): the events before it are not read",
                    name,
                    segment_first(segments[0]),
                )
            read = segment_first(segments[0])  # records read so far, counted as the segments' names count them
            for seg in segments:
                if segment_first(seg) > read:
                    log.error(
                        "%s: its journal lacks records %d to %d (a segment before %s is gone, or was not read to "
                        "its end): they are not read",
                        name,
                        read,
                        segment_first(seg) - 1,
                        seg.name,
                    )
                read = segment_first(seg)
                for item in _journal(seg):
                    read += 1
                    yield item
        elif not path.exists():
            raise InputFileError(name, None, "no such file")
        elif name.endswith((".jsonl", ".jsonl.gz", ".json.gz", ".ndjson")):
            yield from _jsonl(path)
        elif is_journal(path):
            yield from _journal(path)
        else:
            raise InputFileError(name, None, "not JSON Lines (.jsonl, .jsonl.gz) nor a journal segment")


def _jsonl(path: Path) -> Iterator[tuple[float, Any, str]]:
    opener = gzip.open if path.name.endswith(".gz") else open
    now = time.time()
    try:
        with opener(path, "rt", encoding="utf-8") as f:
            for lineno, line in enumerate(f, 1):
                if not line.strip():
                    continue
                try:
                    body = json.loads(line.rstrip("\r\n"))  # (without it, an error at the end is put on a line after)
                except json.JSONDecodeError as e:
                    raise InputFileError(str(path), lineno, f"not JSON ({e.msg} at column {e.colno})") from None
                yield now, body, f"{path}:{lineno}"
    except (OSError, EOFError, UnicodeDecodeError) as e:
        raise InputFileError(str(path), None, f"cannot read ({e})") from None


def is_journal_record(where: str) -> bool:
    """Whether a `where` of `read_bodies` is a journal record's "segment@offset" (what a daemon
    received, as it received it), not a "file:line" of JSON Lines."""
    return where.rpartition("@")[2].isdigit()


def _journal(path: Path) -> Iterator[tuple[float, Any, str]]:
    try:
        for offset, arrival, body in read_journal(path):
            yield arrival, body, f"{path}@{offset}"
    except JournalError as e:
        raise InputFileError(str(path), None, str(e)) from None
