"""Checkpoints and the journal (PROTOCOL 6). Parsed, never unpickled or evaluated.

Checkpoint file `checkpoint-<step>.omc`:
    MAGIC (20 bytes) | u32 LE format version | u64 LE payload length | SHA-256 of payload (32 bytes)
    | payload: msgpack map; numpy arrays as ext type 1 = msgpack [dtype, shape, bytes] with dtype
      one of <f8, <i8, |u1.
Written atomically: a temporary file in the same directory, flush, fsync, rename, fsync of the
directory. The newest KEEP are kept; `load_newest` falls back past a damaged one with a warning.

Journal segment `journal-<first record number>.omj`:
    JOURNAL_MAGIC (17 bytes) | u32 LE version | records
    record: u32 LE payload length | u32 LE CRC-32 of payload | payload = msgpack [arrival_time, body]
A torn or corrupt tail ends the readable part of a segment at the last good record.
"""

from __future__ import annotations

import errno
import fcntl
import hashlib
import logging
import os
import re
import struct
from collections.abc import Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import msgpack
import numpy as np

# zlib-ng's CRC-32 is zlib's checksum (the polynomial of zlib, gzip and PNG), computed with the
# processor's carry-less multiply: a columnar block's 80 KB took 1.5 against 18.8 us with the
# standard library's zlib.crc32 here (measured); test_storage checks that the two agree
from zlib_ng.zlib_ng import crc32

from .errors import CheckpointError, ConfigError, JournalError
from .fastpath import read_batch
from .protocol import Body, Columns

log = logging.getLogger("oddsmill")

MAGIC = b"oddsmill checkpoint\n"
VERSION = 1
KEEP = 3
_HEADER = struct.Struct("<IQ32s")
_ND_EXT = 1
_DTYPES = {"<f8", "<i8", "|u1"}
CHECKPOINT_RE = re.compile(r"^checkpoint-(\d+)\.omc$")

JOURNAL_MAGIC = b"oddsmill journal\n"
JOURNAL_VERSION = 1
_RECORD = struct.Struct("<II")
_ARRIVAL = struct.Struct(">d")  # a msgpack float 64's bytes after its 0xcb
JOURNAL_RE = re.compile(r"^journal-(\d+)\.omj$")
MAX_RECORD = 1 << 30  # a length field beyond this is damage, not a record


# -- checkpoints ---------------------------------------------------------------------------------
def _pack_default(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        arr = np.ascontiguousarray(obj)
        dt = arr.dtype.str
        if dt not in _DTYPES:
            raise TypeError(f"cannot store an array of dtype {dt}")
        return msgpack.ExtType(_ND_EXT, msgpack.packb([dt, list(arr.shape), arr.tobytes()]))
    if isinstance(obj, np.floating | np.integer):
        return obj.item()
    raise TypeError(f"cannot store {type(obj).__name__}")


def _ext_hook(code: int, data: bytes) -> Any:
    if code != _ND_EXT:
        raise CheckpointError(f"unknown extension type {code} in the payload")
    dt, shape, raw = msgpack.unpackb(data)
    if dt not in _DTYPES:
        raise CheckpointError(f"unknown array dtype {dt!r} in the payload")
    return np.frombuffer(raw, dtype=dt).reshape(shape).copy()


def encode_checkpoint(state: dict[str, Any]) -> bytes:
    payload: bytes = msgpack.packb(state, default=_pack_default, use_bin_type=True)
    return MAGIC + _HEADER.pack(VERSION, len(payload), hashlib.sha256(payload).digest()) + payload


def decode_checkpoint(data: bytes, name: str = "checkpoint") -> dict[str, Any]:
    payload = _verified_payload(data, name)
    try:
        state = msgpack.unpackb(payload, ext_hook=_ext_hook, raw=False, strict_map_key=False)
    except CheckpointError:
        raise
    except Exception as e:
        raise CheckpointError(f"{name}: payload does not parse ({e})") from None
    if not isinstance(state, dict):
        raise CheckpointError(f"{name}: payload is not a map")
    return state


def _verified_payload(data: bytes, name: str) -> bytes:
    """A checkpoint's payload, once its magic string, version, length and SHA-256 are right."""
    if not data.startswith(MAGIC):
        raise CheckpointError(f"{name}: not an oddsmill checkpoint (no magic string)")
    head = data[len(MAGIC) : len(MAGIC) + _HEADER.size]
    if len(head) < _HEADER.size:
        raise CheckpointError(f"{name}: truncated header")
    version, length, digest = _HEADER.unpack(head)
    if version != VERSION:
        raise CheckpointError(f"{name}: format version {version}, this oddsmill reads {VERSION}")
    payload = data[len(MAGIC) + _HEADER.size :]
    if len(payload) != length:
        raise CheckpointError(f"{name}: payload is {len(payload)} bytes, header says {length} (truncated?)")
    if hashlib.sha256(payload).digest() != digest:
        raise CheckpointError(f"{name}: checksum mismatch (the file is damaged)")
    return payload


# -- the state directory's holder ------------------------------------------------------------------
LOCK_NAME = "lock"
_NO_LOCKS = {errno.ENOLCK, errno.EOPNOTSUPP, errno.ENOSYS}  # a file system without flock: warned, not refused
_HELD: dict[Path, int] = {}  # state directories this process holds: each one's lock descriptor


def hold_state_dir(state_dir: Path) -> None:
    """Hold `state_dir` for this process until it exits (the exclusive flock of its file "lock",
    which holds the holder's pid): another process that asks is refused with a ConfigError naming
    the holder. Two daemons on one directory would append two streams to one journal, each could
    cut the other's unfinished record as a torn tail, and a replay writing its checkpoint there
    would be resumed from with the daemon's journal after it. The operating system lets go when the
    process ends, however it ends. Asking again in the same process holds nothing more."""
    key = state_dir.resolve()
    if key in _HELD:
        return
    try:
        state_dir.mkdir(parents=True, exist_ok=True)
        fd = os.open(state_dir / LOCK_NAME, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
    except OSError as e:
        raise _unusable(state_dir, e) from None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "unknown"
        os.close(fd)
        raise ConfigError(
            f"the state directory {state_dir} is in use by another oddsmill process (pid {holder}):"
            " stop it first, or give another --state"
        ) from None
    except OSError as e:
        if e.errno not in _NO_LOCKS:
            os.close(fd)
            raise _unusable(state_dir, e) from None
        log.warning(
            "the file system of %s does not take locks (%s): a second process on it will not be refused",
            state_dir,
            e.strerror or e,
        )
    try:
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
    except OSError as e:
        os.close(fd)
        raise _unusable(state_dir, e) from None
    _HELD[key] = fd


def _unusable(state_dir: Path, e: OSError) -> ConfigError:
    return ConfigError(f"cannot use the state directory {state_dir}: {e.strerror or e}")


def release_state_dir(state_dir: Path) -> None:
    """Let go of `state_dir` (held by `hold_state_dir`): another process may take it now."""
    fd = _HELD.pop(state_dir.resolve(), None)
    if fd is not None:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_checkpoint(state_dir: Path, step: int, state: dict[str, Any], keep: int = KEEP) -> Path:
    """Write atomically, then delete all but the newest `keep` checkpoints."""
    state_dir.mkdir(parents=True, exist_ok=True)
    data = encode_checkpoint(state)
    final = state_dir / f"checkpoint-{step:012d}.omc"
    tmp = state_dir / f".{final.name}.tmp"
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, final)
    except OSError:
        tmp.unlink(missing_ok=True)  # a full disk keeps no half-written file
        raise
    _fsync_dir(state_dir)
    for old in list_checkpoints(state_dir)[:-keep]:
        old.unlink(missing_ok=True)
    return final


def list_checkpoints(state_dir: Path) -> list[Path]:
    """Checkpoints oldest first (by step, then by modification order)."""
    found = [p for p in state_dir.iterdir() if CHECKPOINT_RE.match(p.name)] if state_dir.is_dir() else []
    return sorted(found, key=checkpoint_step)


def checkpoint_step(path: Path) -> int:
    """The step a checkpoint's name carries."""
    found = CHECKPOINT_RE.match(path.name)
    if found is None:
        raise ValueError(f"{path.name} is not a checkpoint's name")
    return int(found.group(1))


def read_checkpoint(path: Path) -> dict[str, Any]:
    try:
        data = path.read_bytes()
    except OSError as e:
        raise CheckpointError(f"{path}: cannot read ({e.strerror})") from None
    return decode_checkpoint(data, str(path))


def checkpoint_position(path: Path) -> dict[str, Any] | None:
    """The journal position a checkpoint covers (its "journal": segment, offset, records), read
    without building its model: the file is verified whole, then only the top map's "journal"
    value is unpacked (the model's arrays are skipped). None when it holds none (a replay's) or
    cannot be read (retention then waits, as for a position it never saw)."""
    try:
        payload = _verified_payload(path.read_bytes(), str(path))
        unpacker = msgpack.Unpacker(raw=False, strict_map_key=False, max_buffer_size=max(len(payload), 1))
        unpacker.feed(payload)
        for _ in range(unpacker.read_map_header()):
            if unpacker.unpack() != "journal":
                unpacker.skip()
                continue
            position = unpacker.unpack()
            if not isinstance(position, dict) or not isinstance(position.get("segment"), str):
                return None
            return position if isinstance(position.get("records"), int) else None
    except (OSError, CheckpointError, ValueError, msgpack.UnpackException):
        return None
    return None


def load_newest(state_dir: Path) -> tuple[dict[str, Any], Path] | None:
    """The newest readable checkpoint; a damaged one is skipped with a warning. None when there is
    none at all; CheckpointError when there are some and none can be read."""
    found = list_checkpoints(state_dir)
    errors = []
    for path in reversed(found):
        try:
            return read_checkpoint(path), path
        except CheckpointError as e:
            log.warning("skipping damaged checkpoint: %s", e)
            errors.append(str(e))
    if found:
        raise CheckpointError("no readable checkpoint: " + "; ".join(errors))
    return None


# -- journal ---------------------------------------------------------------------------------------
def journal_record(arrival: float, raw_body: bytes) -> bytes:
    """One record; the body is spliced in as received (it is valid msgpack already)."""
    return b"".join(_record_parts(arrival, [raw_body]))


def _record_parts(arrival: float, raw_bodies: Sequence[Body]) -> list[Body]:
    """The records of bodies that arrived together, as pieces to write one after another (record
    head, payload head, body): the payload head is packed once, and the bodies are not copied (a
    columnar block's body is tens of kilobytes; copying it twice cost more than its CRC)."""
    head = b"\x92\xcb" + _ARRIVAL.pack(arrival)  # [arrival, ...: msgpack.packb(float(arrival))'s bytes
    crc_head = crc32(head)
    parts: list[Body] = []
    for raw in raw_bodies:
        parts += (_RECORD.pack(len(head) + len(raw), crc32(raw, crc_head)), head, raw)
    return parts


# fsyncs started by `JournalWriter.sync_later` run here, one at a time: an fsync can take tens of
# milliseconds, and the daemon's loop goes on meanwhile (os.fsync releases the interpreter)
_IOV_MAX = os.sysconf("SC_IOV_MAX")  # pieces one writev takes (1024 on Linux)
_SYNCER = ThreadPoolExecutor(max_workers=1, thread_name_prefix="oddsmill-fsync")


def _fsync(fd: int) -> None:
    os.fsync(fd)  # looked up when it runs (tests put a failing one in its place)


# The page cache's copies of a segment's bytes are of no more use once they are on disk: the daemon
# reads a segment only when it starts. They are dropped as the journal grows, so that its next bytes
# go to pages the system has just freed rather than to fresh ones. Here, under a virtual machine's
# lazily backed memory, a fresh page cost its first write 2.4 to 5.5 us (a 4 KiB page: 5 us a page
# is 100 us for a columnar block's 80 KB), and appending 4 MB took 10 to 12 ms against 1.0 to 1.1
# with the synced pages dropped (median writes, three runs each; DEVELOPERS.md, twelfth session).
# Every CLEAN_BYTES appended, the background thread advises the system that the segment so far is
# not needed (POSIX_FADV_DONTNEED): the pages already on disk go, and the others start to be
# written, to go at the next step. Advice only: it never waits on the disk, nor takes a write error
# from the fsync that must report it. Each fsync then drops all it covered. (Advice over a 64 MiB
# segment whose pages are gone takes a microsecond or so, so each covers the segment from its start,
# and the pages of a step the disk had not finished go at a later one.)
CLEAN_BYTES = 8 << 20
_advise = getattr(os, "posix_fadvise", None)  # (not on every system)


def _drop(fd: int, end: int) -> None:
    """Drop the page cache's copies of a segment's first `end` bytes: those on disk go, those
    still to be written are handed to the disk. A failed drop leaves them cached: speed only."""
    if _advise is not None:
        try:
            _advise(fd, 0, end, os.POSIX_FADV_DONTNEED)
        except OSError:
            pass


def _sync_and_drop(fd: int, end: int) -> None:
    """fsync, then drop the first `end` bytes (now on disk)."""
    _fsync(fd)
    _drop(fd, end)


def _fallocate() -> Any:
    """Linux's fallocate(2) from the C library, or None (another system, or no glibc)."""
    import ctypes
    import ctypes.util

    try:
        f = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True).fallocate
    except (OSError, AttributeError):
        return None
    f.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_int64, ctypes.c_int64]
    f.restype = ctypes.c_int
    return f


_FALLOCATE = _fallocate()
_KEEP_SIZE = 1  # FALLOC_FL_KEEP_SIZE: blocks reserved past the end, the file's size unchanged


def _reserve(fd: int, size: int) -> bool:
    """Reserve the disk blocks of a file's first `size` bytes without changing its size (so the
    journal stays records end to end, PROTOCOL 6). Appending 80 KB records then skipped the file
    system's allocation of each block: 30 to 36 against 37 to 42 us a record at the median, 33 to
    47 against 46 to 65 on average (`JournalWriter` with a background fsync, six alternating runs
    each; DEVELOPERS.md). Speed only: False where the system or the disk declines (no room for
    the whole segment on a nearly full disk, a file system without it)."""
    if _FALLOCATE is None:
        return False
    return bool(_FALLOCATE(fd, _KEEP_SIZE, 0, size) == 0)


class JournalWriter:
    """Appends records to a segment; `flush` hands them to the operating system, `sync` to the disk,
    and `sync_later` to the disk in the background.

    The buffer is the writer's own (the file is opened unbuffered), so after a failed write it knows
    exactly which bytes reached the file, and `abandon` can drop the rest without writing it. It is
    a list of pieces, written with os.writev, so that the bodies are never copied into it.

    With `reserve`, the disk blocks of the segment's first `reserve` bytes are reserved when it is
    opened (`_reserve`), and what was not used is given back when it is closed: a segment being
    written takes its full size on disk.
    """

    def __init__(self, path: Path, reserve: int = 0) -> None:
        new = not path.exists() or path.stat().st_size == 0
        self.path = path
        self._fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        self._end = os.lseek(self._fd, 0, os.SEEK_END)  # bytes in the file
        self._reserved = reserve > self._end and _reserve(self._fd, reserve)
        self._parts: list[Body] = []  # buffered, in order
        self._size = 0  # their bytes
        self._pending: Future[int] | None = None  # a background fsync, covering bytes up to:
        self._pending_end = 0
        self._cleaned = 0  # where the last cleaning step ended (see CLEAN_BYTES)
        self._cleaning: Future[None] | None = None  # and the step itself
        self._checkpoint_syncs: list[Future[int]] = []  # fsyncs started by `sync_soon`
        self._sync_failed: OSError | None = None  # a background fsync's error (set on its thread)
        if new:  # the header goes to the file at once, so that tell() is an offset the file has
            self._add([JOURNAL_MAGIC + struct.pack("<I", JOURNAL_VERSION)])
            try:
                self.flush()
            except OSError:
                self.abandon()
                raise

    def _add(self, parts: list[Body]) -> None:
        self._parts += parts
        self._size += sum(map(len, parts))

    def append(self, arrival: float, raw_body: Body) -> None:
        self._add(_record_parts(arrival, [raw_body]))

    def append_all(self, arrival: float, raw_bodies: Sequence[Body]) -> None:
        """`append` each body, in order (a block's messages all arrived at once)."""
        self._add(_record_parts(arrival, raw_bodies))

    def write_all(self, arrival: float, raw_bodies: Sequence[Body]) -> None:
        """`append_all`, then `flush`: how the daemon journals each block. With nothing buffered
        (the usual case) the records become the buffer as they are, without joining a list or
        counting the buffer again. With the record's head packed by struct, 3.43 to 3.45 against
        3.78 to 3.83 us for a lone message of 20 features before (best of 7, side by side)."""
        parts = _record_parts(arrival, raw_bodies)
        if self._parts:
            self._add(parts)
        else:
            self._parts, self._size = parts, sum(map(len, parts))
        self.flush()

    def _written(self, n: int) -> None:
        """n more bytes of the buffer reached the file: drop them from it."""
        parts = self._parts
        self._end += n
        self._size -= n
        if self._size == 0:  # all written (the usual case): nothing to count piece by piece
            parts.clear()
            return
        done = 0
        while done < len(parts) and n >= len(parts[done]):
            n -= len(parts[done])
            done += 1
        del parts[:done]
        if n:
            parts[0] = parts[0][n:]

    def flush(self) -> None:
        """Hand what was appended to the operating system: it survives the process dying. After
        a failed or short write the buffer starts at the first byte the file does not have."""
        parts = self._parts
        while parts:
            self._written(os.writev(self._fd, parts[:_IOV_MAX]))
        if self._end - self._cleaned >= CLEAN_BYTES:
            self._clean()

    def fileno(self) -> int:
        """The segment's descriptor, for a caller that appends records itself (quick.py); -1 once
        closed. Only while nothing is buffered (`buffered`), and it tells `wrote` what it wrote."""
        return self._fd

    def buffered(self) -> int:
        """Bytes appended and not yet handed to the operating system."""
        return self._size

    def wrote(self, n: int) -> None:
        """n bytes of records reached the file through `fileno`, as if `write_all` had written them."""
        self._end += n
        if self._end - self._cleaned >= CLEAN_BYTES:
            self._clean()

    def _clean(self) -> None:
        """A cleaning step (see CLEAN_BYTES), unless the last one is still running."""
        if self._cleaning is None or self._cleaning.done():
            self._cleaned = self._end
            self._cleaning = _SYNCER.submit(_drop, self._fd, self._end)

    def sync(self) -> None:
        """flush, then fsync: it survives the machine losing power. Waits for a background fsync
        first, and raises its error if it failed (a failed fsync is never followed by one that
        could seem to succeed: the kernel may have dropped the pages the first one could not
        write)."""
        self._wait(raising=True)
        if self._sync_failed is not None:  # (one started by `sync_soon`, whose caller had it too)
            raise self._sync_failed
        self.flush()
        _sync_and_drop(self._fd, self._end)

    def sync_later(self) -> bool:
        """flush, then start an fsync in the background; False (and no fsync) while the last one
        started has not been collected by `synced_to`."""
        if self._pending is not None:
            return False
        self.flush()
        self._pending_end = self._end
        self._pending = _SYNCER.submit(self._background_sync, self._end)
        return True

    def sync_soon(self) -> Future[int]:
        """flush, then an fsync on the background thread after those started before it: its
        future gives the offset up to which the segment is then on disk, or raises OSError, also
        when a background fsync before it failed (`sync`'s rule, kept on the thread that runs
        them all). For a checkpoint: the loop does not wait on the disk (the loop's `sync` after
        200,000 columnar rows took 4.0 ms here, and takes longer on a slower disk)."""
        self.flush()
        self._checkpoint_syncs = [f for f in self._checkpoint_syncs if not f.done()]
        job = _SYNCER.submit(self._background_sync, self._end)
        self._checkpoint_syncs.append(job)
        return job

    def _background_sync(self, end: int) -> int:
        """`_sync_and_drop` on the background thread; its error is kept for the fsyncs after it."""
        if self._sync_failed is not None:
            raise self._sync_failed
        try:
            _sync_and_drop(self._fd, end)
        except OSError as e:
            self._sync_failed = e
            raise
        return end

    def synced_to(self, wait: bool = False) -> int | None:
        """When a background fsync has finished (or, with `wait`, once it has): the offset up to
        which the segment is on disk. None when there is none to collect. Raises its OSError."""
        job = self._pending
        if job is None or not (wait or job.done()):
            return None
        self._pending = None
        job.result()
        return self._pending_end

    def _wait(self, raising: bool) -> None:
        if self._cleaning is not None:  # (never raises) before the descriptor is closed
            self._cleaning.result()
            self._cleaning = None
        for job in self._checkpoint_syncs:  # (their callers take their errors)
            job.exception()
        self._checkpoint_syncs = []
        try:
            self.synced_to(wait=True)
        except OSError:
            if raising:
                raise

    def tell(self) -> int:
        """The byte offset just past the last record appended."""
        return self._end + self._size

    def close(self) -> None:
        if self._fd < 0:
            return
        try:
            self._wait(raising=True)
            self.flush()
        finally:
            self._unreserve()
            os.close(self._fd)
            self._fd = -1

    def _unreserve(self) -> None:
        """Give back the reserved blocks past the last byte written (a cut to the file's own size
        frees them); speed and room only, so a failure is ignored."""
        if self._reserved:
            self._reserved = False
            try:
                os.ftruncate(self._fd, self._end)
            except OSError:
                pass

    def abandon(self) -> None:
        """Close after a failed write, dropping what is still buffered (it will be written again)."""
        self._wait(raising=False)
        self._parts.clear()
        self._size = 0
        if self._fd < 0:
            return
        self._unreserve()
        try:
            os.close(self._fd)
        except OSError:
            pass
        self._fd = -1

    @staticmethod
    def cut(path: Path, offset: int) -> None:
        """Cut a segment back to `offset` (the end of its last record known to be good), on disk."""
        with open(path, "r+b") as f:
            f.truncate(offset)
            f.flush()
            os.fsync(f.fileno())

    def __enter__(self) -> JournalWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass(frozen=True)
class Read:
    """A journaled batch of numeric training events, read by the compiled fast path."""

    blocks: list[Columns]


def read_journal(path: Path, start: int = 0, fast: bool = False) -> Iterator[tuple[int, float, Any]]:
    """(byte offset just past the record, arrival time, body) for each good record from byte
    `start` on (the end of an earlier record, as a checkpoint keeps it; 0 for the first); stops at
    a torn or corrupt tail after logging where. JournalError when the header is wrong. With `fast`,
    a batch of numeric training events comes as a `Read` (fastpath.read_batch), not decoded."""
    with open(path, "rb") as f:
        data = f.read()
    head = len(JOURNAL_MAGIC) + 4
    if not data.startswith(JOURNAL_MAGIC) or len(data) < head:
        raise JournalError(f"{path}: not an oddsmill journal segment (no magic string)")
    (version,) = struct.unpack_from("<I", data, len(JOURNAL_MAGIC))
    if version != JOURNAL_VERSION:
        raise JournalError(f"{path}: journal version {version}, this oddsmill reads {JOURNAL_VERSION}")
    if start > len(data):  # the segment lost a tail the position had seen (a power cut under fsync=os)
        log.warning("%s: position %d is past the end of the segment (%d bytes)", path, start, len(data))
        return
    pos = max(head, start)
    while pos < len(data):
        if pos + _RECORD.size > len(data):
            log.warning("%s: torn record header at byte %d; the tail is ignored", path, pos)
            return
        length, crc = _RECORD.unpack_from(data, pos)
        end = pos + _RECORD.size + length
        if length > MAX_RECORD or end > len(data):
            log.warning("%s: torn record at byte %d; the tail is ignored", path, pos)
            return
        payload = data[pos + _RECORD.size : end]
        if crc32(payload) != crc:
            later = good_record_after(data, pos)  # (the bytes already read)
            if later is None:
                log.warning("%s: corrupt record at byte %d (CRC mismatch); the tail is ignored", path, pos)
            else:  # not a tail: the records after it are there, and are not read (the file is left as it is)
                log.error(
                    "%s: a damaged record at byte %d (CRC mismatch), and good records after it from byte %d: "
                    "the rest of the segment is not read",
                    path,
                    pos,
                    later,
                )
            return
        if fast and payload[:2] == b"\x92\xcb":  # [float64 arrival, body]
            got = read_batch(payload[10:])
            if got is not None:
                yield end, struct.unpack_from(">d", payload, 2)[0], Read(got)
                pos = end
                continue
        try:
            arrival, body = msgpack.unpackb(payload, raw=False, strict_map_key=False)
        except Exception:
            log.warning("%s: unreadable record at byte %d; the tail is ignored", path, pos)
            return
        yield end, float(arrival), body
        pos = end


def good_record_after(data: bytes, start: int) -> int | None:
    """Where the first record after the one at byte `start` of a segment's bytes begins whose
    length and CRC-32 hold (and whose payload begins as every record's does, [float64 arrival,
    ...]), or None. A segment with one after its first bad record was damaged in its middle, not
    torn at its end."""
    at = data.find(b"\x92\xcb", start + _RECORD.size + 1)  # a payload's first bytes
    while at != -1:
        pos = at - _RECORD.size
        length, crc = _RECORD.unpack_from(data, pos)
        if 10 <= length <= MAX_RECORD and at + length <= len(data) and crc32(data[at : at + length]) == crc:
            return pos
        at = data.find(b"\x92\xcb", at + 1)
    return None


def list_journal(state_dir: Path) -> list[Path]:
    found = [p for p in state_dir.iterdir() if JOURNAL_RE.match(p.name)] if state_dir.is_dir() else []
    return sorted(found, key=segment_first)


def segment_first(path: Path) -> int:
    """The number of the first record a journal segment holds (its name carries it: the count of
    records journaled before it)."""
    found = JOURNAL_RE.match(path.name)
    if found is None:
        raise ValueError(f"{path.name} is not a journal segment's name")
    return int(found.group(1))


def is_journal(path: Path) -> bool:
    try:
        with open(path, "rb") as f:
            return f.read(len(JOURNAL_MAGIC)) == JOURNAL_MAGIC
    except OSError:
        return False
