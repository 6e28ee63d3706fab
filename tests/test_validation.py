"""The shared setting checks: allowed values come back converted, others raise naming the setting."""

from __future__ import annotations

import numpy as np
import pytest

from qlab.validation import (
    require_choice,
    require_gamma,
    require_int,
    require_int_list,
    require_name,
    require_non_negative,
    require_positive,
    require_range,
    require_within,
)


def test_allowed_values_come_back_converted():
    assert require_positive("dt_s", np.float32(0.5)) == 0.5 and type(require_positive("dt_s", 2)) is float
    assert require_non_negative("noise", 0) == 0.0
    assert require_within("tau", 1, 0.0, 1.0) == 1.0
    assert require_gamma(np.array(0.99)) == 0.99
    assert require_int("steps", 3.0, 1) == 3 and type(require_int("steps", np.int64(3), 1)) is int
    assert require_int_list("bins", (4, 5.0)) == [4, 5]
    assert require_choice("loss", "huber", ("squared", "huber")) == "huber"
    assert require_range("start", [1, 2], low=0.0) == (1.0, 2.0)
    assert require_name("series_name", "demo") == "demo"


@pytest.mark.parametrize(
    ("check", "message"),
    [
        (lambda: require_positive("dt_s", 0.0), "dt_s must be a finite number > 0, got 0.0"),
        (lambda: require_positive("dt_s", float("nan")), "dt_s must be a finite number > 0, got nan"),
        (lambda: require_positive("dt_s", "1"), "dt_s must be a finite number > 0, got '1'"),
        (lambda: require_non_negative("grad_clip_norm", -1, note="(0 disables)"),
         r"grad_clip_norm must be a finite number >= 0 \(0 disables\), got -1"),
        (lambda: require_within("tau", 1.5, 0.0, 1.0), r"tau must lie in \[0, 1\], got 1.5"),
        (lambda: require_gamma(1.0, above_zero=True, below_one=True, note="for the audit"),
         r"gamma must lie in \(0, 1\) for the audit, got 1.0"),
        (lambda: require_gamma(0.0, above_zero=True), r"gamma must lie in \(0, 1\], got 0.0"),
        (lambda: require_int("batch_size", 0, 1), "batch_size must be an integer >= 1, got 0"),
        (lambda: require_int("batch_size", 2.5, 1), "batch_size must be an integer >= 1, got 2.5"),
        (lambda: require_int("batch_size", True, 1), "batch_size must be an integer >= 1, got True"),
        (lambda: require_int_list("hidden_sizes", [8, 0]), r"hidden_sizes must be a non-empty list of integers >= 1"),
        (lambda: require_int_list("bins", [], note="(one per dimension)"),
         r"bins must be a non-empty list of integers >= 1 \(one per dimension\), got \[\]"),
        (lambda: require_choice("loss", "l3", ("squared", "huber")),
         r"loss must be one of \['squared', 'huber'\], got 'l3'"),
        (lambda: require_range("start", (2.0, 1.0)), "start must be a finite"),
        (lambda: require_range("start", 3.0), r"start must be a \(low, high\) pair, got 3.0"),
        (lambda: require_name("series_name", "a/b"), "series_name must be a single folder name"),
    ],
)
def test_errors_name_the_setting_and_what_is_allowed(check, message):
    with pytest.raises(ValueError, match=f"^{message}"):
        check()
