"""The store-and-forward spool: a bounded file of records, on disk, that a writer appends to while the database
is unavailable and reads back, in order, when it returns.

The file is reserved at its full size when it is opened (``posix_fallocate``), so a disk that fills up later
cannot refuse an append: the blocks are already the spool's. It is created with mode 0600 (its records are
alarm history) and held with an exclusive ``flock`` so two processes never share one.

Layout: a 32-byte header (``SWSPOOL1`` and a random 8-byte epoch), then records, each a 24-byte head
(epoch, sequence number from 1, payload length, CRC-32 of sequence, length and payload) and the payload.
Every append is followed by ``fdatasync`` before it returns, so a record appended survives ``kill -9``
and a power cut. Reading stops at the first record that is not whole and right (a torn last write, or
an older epoch's record beyond the end): what was appended and synced is read back, nothing else.
:meth:`Spool.clear` starts a new epoch, which makes every older record unreadable at once.
"""

from __future__ import annotations

import errno
import fcntl
import os
import struct
import zlib
from collections.abc import Iterator
from pathlib import Path

MAGIC = b"SWSPOOL1"
HEADER = struct.Struct("<8s8s16x")  # magic, epoch, reserved
HEAD = struct.Struct("<8sQII")  # epoch, sequence number, payload length, CRC-32
MIN_CAPACITY = 64 * 1024


class SpoolFull(Exception):
    """The record does not fit in what is left of the spool."""


class SpoolBusy(Exception):
    """Another process has the spool open."""


def _crc(seq: int, payload: bytes) -> int:
    return zlib.crc32(payload, zlib.crc32(struct.pack("<QI", seq, len(payload))))


class Spool:
    """A bounded on-disk FIFO of byte records at ``path``, ``capacity`` bytes including its header.

    :attr:`reserved` says whether the full size could be reserved at opening (False: appends take space as
    they go, and a full disk refuses them; :attr:`reserve_error` says why).
    """

    def __init__(self, path: str | Path, capacity: int) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        try:
            os.fchmod(fd, 0o600)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                raise SpoolBusy(f"{self.path}: the spool is open in another process (another spanwatch of this "
                                "line and history)") from None
            size = os.fstat(fd).st_size
            self.capacity = max(int(capacity), MIN_CAPACITY, size)
            self.reserved, self.reserve_error = True, ""
            if size < self.capacity:
                try:
                    os.posix_fallocate(fd, 0, self.capacity)
                except OSError as exc:
                    self.reserved, self.reserve_error = False, os.strerror(exc.errno or errno.EIO)
            self.fd = fd
            self._scan()
        except BaseException:
            os.close(fd)
            raise

    # --- reading the file --------------------------------------------------------------------------------------------

    def _scan(self) -> None:
        raw = os.pread(self.fd, HEADER.size, 0)
        magic, epoch = HEADER.unpack(raw) if len(raw) == HEADER.size else (b"", b"")
        self.records: list[tuple[int, int]] = []  # (offset of the payload, its length)
        if magic != MAGIC:
            self._new_epoch()
            return
        self.epoch = epoch
        off = HEADER.size
        while off + HEAD.size <= self.capacity:
            head = os.pread(self.fd, HEAD.size, off)
            if len(head) < HEAD.size:
                break
            ep, seq, length, crc = HEAD.unpack(head)
            if ep != self.epoch or seq != len(self.records) + 1 or off + HEAD.size + length > self.capacity:
                break
            payload = os.pread(self.fd, length, off + HEAD.size)
            if len(payload) != length or _crc(seq, payload) != crc:
                break
            self.records.append((off + HEAD.size, length))
            off += HEAD.size + length
        self.end = off

    def _new_epoch(self) -> None:
        self.epoch = os.urandom(8)
        os.pwrite(self.fd, HEADER.pack(MAGIC, self.epoch), 0)
        os.fdatasync(self.fd)
        self.records = []
        self.end = HEADER.size

    # --- what it holds ------------------------------------------------------------------------------------------------

    @property
    def count(self) -> int:
        """Records held."""
        return len(self.records)

    @property
    def used(self) -> int:
        """Bytes held, header included."""
        return self.end

    def fits(self, size: int) -> bool:
        """Whether a payload of ``size`` bytes fits in what is left."""
        return self.end + HEAD.size + size <= self.capacity

    def read(self) -> Iterator[bytes]:
        """The payloads held, oldest first."""
        for off, length in list(self.records):
            yield os.pread(self.fd, length, off)

    # --- changing it --------------------------------------------------------------------------------------------------

    def append(self, payload: bytes) -> None:
        """Append one record and sync it to disk before returning.

        Raises :class:`SpoolFull` when it does not fit, :class:`OSError` when the disk refuses it (an unreserved
        spool on a full disk, an I/O error); the spool is unchanged then.
        """
        if not self.fits(len(payload)):
            raise SpoolFull(f"{self.path}: full ({self.end} of {self.capacity} bytes used)")
        seq = len(self.records) + 1
        data = HEAD.pack(self.epoch, seq, len(payload), _crc(seq, payload)) + payload
        written = os.pwrite(self.fd, data, self.end)
        if written != len(data):
            raise OSError(errno.ENOSPC, f"{self.path}: short write ({written} of {len(data)} bytes)")
        os.fdatasync(self.fd)
        self.records.append((self.end + HEAD.size, len(payload)))
        self.end += len(data)

    def clear(self) -> None:
        """Forget every record (they were written to the database): a new epoch, synced."""
        self._new_epoch()

    def close(self) -> None:
        """Close the file (and release its lock); what it holds stays for the next opening."""
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1
