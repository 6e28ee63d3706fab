"""The metrics table on disk: appended at commits, cut back to the checkpoint on resume, torn tails dropped."""

from __future__ import annotations

import pytest

from qlab.recording import METRICS, Recorder, read_metrics


def test_commits_append_and_a_resume_cuts_the_table_back_to_its_checkpoint(tmp_path):
    recorder = Recorder(tmp_path, tensorboard=False)
    recorder.scalar("eval/success", 0.25, 100)
    recorder.commit()
    recorder.scalars({"success": 0.5, "length": 12.0}, 200, "eval/")
    recorder.commit()
    recorder.scalar("eval/success", 0.75, 300)  # recorded after the last commit: not on disk
    assert read_metrics(tmp_path) == [(100, "eval/success", 0.25), (200, "eval/success", 0.5),
                                      (200, "eval/length", 12.0)]
    resumed = Recorder(tmp_path, resume_step=100, tensorboard=False)  # the checkpoint at step 100
    assert resumed.rows == read_metrics(tmp_path) == [(100, "eval/success", 0.25)]


def test_a_torn_last_line_ends_a_resume_read_and_fails_a_plain_read(tmp_path):
    # a crash while rows were being appended leaves part of a line after the last complete row
    (tmp_path / METRICS).write_text("step,tag,value\n100,eval/success,0.25\n200,eval/succ")
    assert read_metrics(tmp_path, up_to_step=10_000) == [(100, "eval/success", 0.25)]
    (tmp_path / METRICS).write_text("step,tag,value\n100,eval/success,0.25\n2")  # torn inside the step
    assert read_metrics(tmp_path, up_to_step=10_000) == [(100, "eval/success", 0.25)]
    with pytest.raises((TypeError, ValueError)):
        read_metrics(tmp_path)  # a finished run's table must be whole
