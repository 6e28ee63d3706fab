"""Tensorboard event files, written in batches.

An event file is a sequence of records, each ``uint64 length``, ``uint32 masked CRC-32C of the
length``, the serialized ``Event`` protocol buffer and ``uint32 masked CRC-32C of it`` (all
little-endian), the framing tensorboard's own writer and reader use. qlab writes scalars in
batches (at every checkpoint), so the checksums of a whole batch are computed at once in numpy,
one byte position at a time across all records, instead of one Python loop per byte and record
(tensorboard's fallback without TensorFlow, some 8 us per scalar). Scalar events are encoded by
hand, field for field as the protobuf library encodes them; text and hparams summaries, written
once per run, go through the protobuf classes.
"""

from __future__ import annotations

import os
import socket
import struct
import time
from pathlib import Path

import numpy as np
from tensorboard.compat.proto.event_pb2 import Event, SessionLog
from tensorboard.compat.proto.summary_pb2 import Summary

FILE_VERSION = "brain.Event:2"
_CASTAGNOLI_REFLECTED = 0x82F63B78  # CRC-32C polynomial, bit-reversed
_MASK_DELTA = 0xA282EAD8


def _crc_table() -> np.ndarray:
    """CRC-32C of every byte value, for the byte-at-a-time (table-driven) update."""
    crc = np.arange(256, dtype=np.uint32)
    for _ in range(8):
        crc = np.where(crc & 1, (crc >> 1) ^ np.uint32(_CASTAGNOLI_REFLECTED), crc >> 1).astype(np.uint32)
    return crc


_TABLE = _crc_table()


def crc32c(buffers: list[bytes]) -> np.ndarray:
    """CRC-32C of each buffer, ``(len(buffers),)`` uint32; vectorised over the buffers, one byte position at a time."""
    lengths = np.fromiter((len(b) for b in buffers), dtype=np.int64, count=len(buffers))
    order = np.argsort(-lengths, kind="stable")  # longest first: the buffers still going at a position are a prefix
    ordered = lengths[order]
    width = int(ordered[0]) if ordered.size else 0
    columns = np.zeros((width, len(buffers)), dtype=np.uint32)  # byte j of the k-th longest buffer at [j, k]
    starts = (np.cumsum(lengths) - lengths)[order]
    rank = np.repeat(np.arange(len(buffers)), ordered)
    position = np.arange(int(ordered.sum())) - np.repeat(np.cumsum(ordered) - ordered, ordered)
    columns[position, rank] = np.frombuffer(b"".join(buffers), dtype=np.uint8)[starts[rank] + position]
    going = np.searchsorted(-ordered, -np.arange(width), side="left")  # how many buffers have a byte at j
    crc = np.full(len(buffers), 0xFFFFFFFF, dtype=np.uint32)
    for j in range(width):
        k = going[j]
        head = crc[:k]
        crc[:k] = np.take(_TABLE, (head ^ columns[j, :k]) & 0xFF) ^ (head >> 8)
    out = np.empty_like(crc)
    out[order] = crc ^ np.uint32(0xFFFFFFFF)
    return out


def masked_crc32c(buffers: list[bytes]) -> np.ndarray:
    """The masked CRC-32C of each buffer: the CRC rotated right by 15 bits plus 0xA282EAD8 (mod 2^32)."""
    crc = crc32c(buffers).astype(np.uint64)
    rotated = ((crc >> 15) | (crc << 17)) & 0xFFFFFFFF
    return ((rotated + _MASK_DELTA) & 0xFFFFFFFF).astype(np.uint32)


def _varint(n: int) -> bytes:
    """Protobuf base-128 varint of a non-negative integer."""
    out = bytearray()
    while n > 0x7F:
        out.append((n & 0x7F) | 0x80)
        n >>= 7
    out.append(n)
    return bytes(out)


def _float32(value: float) -> bytes:
    """``value`` rounded to float32, little-endian; beyond float32's range it becomes +-inf, as in protobuf."""
    try:
        return struct.pack("<f", value)
    except OverflowError:
        return struct.pack("<f", float("inf") if value > 0 else float("-inf"))


def scalar_event(tag: str, value: float, step: int, wall_time: float) -> bytes:
    """A serialized ``Event`` holding one ``simple_value`` scalar, as ``Event.SerializeToString`` gives it.

    Fields in number order: wall_time (1, double), step (2, varint), summary (5) holding one
    value (1) with tag (1) and simple_value (2, float32); proto3 leaves out a zero wall time or step.
    """
    if step < 0:
        raise ValueError(f"event steps must be >= 0, got {step}")
    name = tag.encode("utf-8")
    entry = b"\x0a" + _varint(len(name)) + name + b"\x15" + _float32(value)
    summary = b"\x0a" + _varint(len(entry)) + entry
    head = (b"\x09" + struct.pack("<d", wall_time) if wall_time else b"") + (b"\x10" + _varint(step) if step else b"")
    return head + b"\x2a" + _varint(len(summary)) + summary


def frame(events: list[bytes]) -> bytes:
    """Serialized events as event-file records (length, masked CRC of length, event, masked CRC of event)."""
    if not events:
        return b""
    heads = [struct.pack("<Q", len(e)) for e in events]
    head_crcs, event_crcs = masked_crc32c(heads), masked_crc32c(events)
    parts = []
    for head, head_crc, event, event_crc in zip(heads, head_crcs.tolist(), events, event_crcs.tolist(), strict=True):
        parts += [head, struct.pack("<I", head_crc), event, struct.pack("<I", event_crc)]
    return b"".join(parts)


class EventFile:
    """One new event file in ``folder``: events queue in memory and reach the file at :meth:`flush`.

    ``purge_step``: tensorboard drops events of earlier files at or after this step (a resumed
    run writes this so the steps after its checkpoint are not shown twice).
    """

    def __init__(self, folder: Path, purge_step: int | None = None):
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        self.path = folder / f"events.out.tfevents.{time.time_ns():020d}.{socket.gethostname()}.{os.getpid()}"
        self.queue: list[bytes] = []
        now = time.time()
        self.queue.append(Event(wall_time=now, file_version=FILE_VERSION).SerializeToString())
        if purge_step is not None:
            start = SessionLog(status=SessionLog.START)
            self.queue.append(Event(wall_time=now, step=purge_step, session_log=start).SerializeToString())
        self.handle = self.path.open("wb")
        self.flush()

    def scalar(self, tag: str, value: float, step: int, wall_time: float) -> None:
        """Queue one scalar."""
        self.queue.append(scalar_event(tag, value, step, wall_time))

    def summary(self, summary: Summary, step: int = 0) -> None:
        """Queue a summary protocol buffer (text, hparams) at ``step``, stamped now."""
        self.queue.append(Event(wall_time=time.time(), step=step, summary=summary).SerializeToString())

    def flush(self) -> None:
        """Write the queued events and flush the file."""
        self.handle.write(frame(self.queue))
        self.handle.flush()
        self.queue.clear()

    def close(self) -> None:
        self.flush()
        self.handle.close()
