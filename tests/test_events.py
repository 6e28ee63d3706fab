"""qlab's batched event-file writer against tensorboard's and protobuf's own code."""

from __future__ import annotations

import random

import numpy as np
import pytest
from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
from tensorboard.compat.proto.event_pb2 import Event
from tensorboard.compat.proto.summary_pb2 import Summary
from tensorboard.compat.tensorflow_stub.pywrap_tensorflow import masked_crc32c as tensorboard_masked_crc32c
from torch.utils.tensorboard.summary import text

from qlab.events import EventFile, crc32c, masked_crc32c, scalar_event


def test_crc32c_check_value():
    # CRC-32C (Castagnoli) of the ASCII digits "123456789" is 0xE3069283: the check value of CRC-32/ISCSI in
    # G. Cook's "Catalogue of parametrised CRC algorithms" (from memory)
    assert int(crc32c([b"123456789"])[0]) == 0xE3069283
    assert crc32c([]).shape == (0,) and int(crc32c([b""])[0]) == 0  # nothing to check: CRC-32C of no bytes is 0


def test_masked_crc32c_equals_tensorboards_for_buffers_of_every_length():
    rng = random.Random(0)
    buffers = [bytes(rng.randrange(256) for _ in range(n)) for n in [0, 1, 7, 8, 9, 63, 64, 200, *range(40)]]
    # tensorboard.compat.tensorflow_stub.pywrap_tensorflow.masked_crc32c: tensorboard's own framing checksum
    assert masked_crc32c(buffers).tolist() == [tensorboard_masked_crc32c(b) for b in buffers]


@pytest.mark.parametrize(("tag", "value", "step", "wall_time"), [
    ("episode/success", 0.5, 0, 0.0),
    ("eval/discounted_return", 0.731, 123_456_789, 1.7e9),
    ("learn/q_max", 1e39, 1, 2.5),  # beyond float32: +inf, as protobuf rounds it
    ("learn/abs_td_error", float("nan"), 2**40, 3.0),
    ("speed/steps_per_second", -0.0, 5, 4.0),
    ("eval/ü", 0.0, 300, 5.0),
])
def test_scalar_event_bytes_equal_protobuf_serialization(tag, value, step, wall_time):
    event = Event(wall_time=wall_time, step=step, summary=Summary(value=[Summary.Value(tag=tag, simple_value=value)]))
    assert scalar_event(tag, value, step, wall_time) == event.SerializeToString()  # protobuf's own encoder


def scalars_seen(folder):
    board = EventAccumulator(str(folder), size_guidance={"scalars": 0, "tensors": 0})
    board.Reload()
    return board, {tag: [(e.step, e.value) for e in board.Scalars(tag)] for tag in board.Tags()["scalars"]}


def test_event_files_read_back_through_tensorboard_with_text_and_purge(tmp_path):
    first = EventFile(tmp_path)
    first.summary(text("config", "seed: 0"))
    for step in (10, 20, 30):
        first.scalar("eval/success", step / 40, step, 1000.0 + step)
    first.close()
    resumed = EventFile(tmp_path, purge_step=21)  # a resume from step 20: the event at 30 is dropped
    resumed.scalar("eval/success", 0.875, 30, 2000.0)
    resumed.close()
    board, seen = scalars_seen(tmp_path)  # tensorboard's reader, orphaned data purged as in its server
    assert seen == {"eval/success": [(10, 0.25), (20, 0.5), (30, 0.875)]}
    assert [e.wall_time for e in board.Scalars("eval/success")] == [1010.0, 1020.0, 2000.0]
    assert "config/text_summary" in board.Tags()["tensors"]
    assert np.float32(0.875) == seen["eval/success"][-1][1]
