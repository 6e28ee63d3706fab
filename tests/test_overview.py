"""The overview across task settings on a hand-made series: two start-distance ranges, three shaping arms.

Every run's success is 0 until its first reach of the threshold and 1 from then on, so the steps to
threshold are exactly the ones written here; medians, bounds and speed-ups are worked out by hand.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import trim_mean
from series_folders import base_config, with_keys, write_run
from test_report import PNG_SIGNATURE, section, table

from qlab.compare import figures, stats
from qlab.compare.overview import SETTINGS_FIGURE, setting_axis
from qlab.compare.report import main
from qlab.compare.runs import Study, TaskSetting

STEPS = [0, 250, 500, 1000, 2000, 4000, 8000, 16000]
BUDGET = 16000
#: (setting, arm) -> first evaluation step at which each seed's success reaches 1 (None: never)
FIRST_REACH = {
    ("near", "none"): [2000, 4000, 8000, 8000, None],  # sorted 2000, 4000, 8000, 8000, never: median 8,000
    ("near", "potential"): [250, 250, 500, 1000, None],  # median 500
    ("near", "progress"): [250, None, None, 500, None],  # 3 of 5 never: censored, "> 16,000"
    ("far", "none"): [4000, None, None, 16000, None],  # 3 of 5 never: censored
    ("far", "potential"): [500, 500, 2000, None, 16000],  # sorted 500, 500, 2000, 16000, never: median 2,000
    ("far", "progress"): [None, None, None, 500, 1000],  # censored
}
#: setting -> start distance range (m); the figure puts a setting at the far end of its range
RANGES = {"near": [8.0, 12.0], "far": [10.0, 14.0]}
COLUMNS = {"near": 0, "far": 1}
STEPS_SECTION = "Steps to a success rate of 0.5 across task settings"


def hand_steps(setting: str, arm: str) -> np.ndarray:
    """Steps to threshold as the report counts them: a run that never reaches it, infinitely many."""
    return np.array([np.inf if f is None else f for f in FIRST_REACH[(setting, arm)]], dtype=np.float64)


@pytest.fixture(scope="module")
def series(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("overview")
    config = base_config(["learner=tabular", f"budget_steps={BUDGET}"])
    for (setting, arm), reach in FIRST_REACH.items():
        for seed, first in enumerate(reach):
            success = [float(first is not None and s >= first) for s in STEPS]
            keys = {"task.start_distance_m": RANGES[setting], "shaping.variant": arm, "seed": seed}
            write_run(folder / f"{setting},{arm},seed={seed}", with_keys(config, **keys), STEPS, success,
                      [0.5 * v for v in success])
    return folder


@pytest.fixture(scope="module")
def overview(series, tmp_path_factory) -> tuple[Path, list]:
    """The report written twice into two folders, with the figures saved on the way."""
    saved = []
    original = figures.save_png
    patch = pytest.MonkeyPatch()
    patch.setattr(figures, "save_png", lambda fig, path: saved.append((path, fig)) or original(fig, path))
    outs = [tmp_path_factory.mktemp(f"out{i}") for i in range(2)]
    try:
        for out in outs:
            assert main([str(series), "--no-diagnostics", "--out", str(out)]) == 0
    finally:
        patch.undo()
    return outs, saved


def rows(markdown: str, title: str) -> dict[str, list[str]]:
    return {row[1]: row[2:] for row in table(section(markdown, title))}


def test_median_steps_per_setting_with_bounds_where_censored(overview):
    (out, _), _ = overview
    cells = rows((out / "report.md").read_text(), STEPS_SECTION)
    expected = {"none": ["8,000", "> 16,000"], "potential": ["500", "2,000"], "progress": ["> 16,000", "> 16,000"]}
    for arm, medians in expected.items():
        for setting, column in COLUMNS.items():
            cell, median = cells[arm][column], medians[column]
            if median.startswith(">"):
                assert cell == median  # a bound, no interval
            else:
                low, high = stats.median_ci(hand_steps(setting, arm), 0.95, seed=0)
                assert cell == f"{median} [{low:,.0f}, {'inf' if np.isinf(high) else f'{high:,.0f}'}]"


def test_speed_up_over_none_per_setting(overview):
    (out, _), _ = overview
    markdown = (out / "report.md").read_text()
    cells = rows(markdown, "Speed-up over `none` across task settings")
    assert set(cells) == {"potential", "progress"}
    # near: 8000 / 500 = 16, with its interval (the steps are never 0, so the 1-step floor changes nothing)
    ratio = stats.median_ratio(hand_steps("near", "none"), hand_steps("near", "potential"), limit=BUDGET, seed=0)
    assert cells["potential"][0] == f"16.00 [{ratio.low:.2f}, {'inf' if np.isinf(ratio.high) else f'{ratio.high:.2f}'}]"
    # far: none censored, median > 16,000, potential 2,000: the speed-up exceeds 16000 / 2000 = 8
    assert cells["potential"][1] == "> 8.00"
    # near: progress censored (> 16,000) against none's 8,000: below 8000 / 16000 = 0.5
    assert cells["progress"][0] == "< 0.50"
    assert cells["progress"][1] == "undetermined"  # both censored


def test_iqm_final_success_per_setting(overview):
    (out, _), _ = overview
    cells = rows((out / "report.md").read_text(), "Final success across task settings")
    for (setting, arm), reach in FIRST_REACH.items():
        final = np.array([float(f is not None) for f in reach])  # success 1 from the first reach on
        # e.g. near none: sorted 0, 1, 1, 1, 1, one dropped at each end (floor(5 / 4) = 1): mean of 1, 1, 1 = 1.00;
        # scipy.stats.trim_mean(x, 0.25) is the interquartile mean (Agarwal et al. 2021)
        assert cells[arm][COLUMNS[setting]].split(" [")[0] == f"{trim_mean(final, 0.25):.2f}"
    assert cells["none"][1].startswith("0.33 [")  # far none: sorted 0, 0, 0, 1, 1; mean of 0, 0, 1


def test_figure_opens_the_overview_and_marks_censored_medians(overview):
    (out, _), saved = overview
    markdown = (out / "report.md").read_text()
    assert markdown.index(f"## {STEPS_SECTION}") < markdown.index("## Speed-up") < markdown.index("## Task settings")
    assert f"![steps_by_task_setting]({SETTINGS_FIGURE})" in section(markdown, STEPS_SECTION)
    assert "Open triangles pointing up, at the budget" in section(markdown, STEPS_SECTION)
    [fig] = [f for path, f in saved if path == out / SETTINGS_FIGURE]
    ax = fig.axes[0]
    assert list(ax.get_xticks()) == [12.0, 14.0]  # far ends of [8, 12] and [10, 14]
    assert ax.get_xlabel() == "task.start_distance_m, far end of the range"
    assert ax.get_yscale() == "log"  # 250 to 16,000 spans more than a factor of 10
    colours = {arm: figures.arm_colour(arm) for arm in ("none", "potential", "progress")}
    lines = [line for line in ax.get_lines() if line.get_label() in colours]
    centres = {line.get_label(): line.get_ydata().tolist() for line in lines}
    assert centres == {"none": [8000.0, pytest.approx(np.nan, nan_ok=True)], "potential": [500.0, 2000.0],
                       "progress": [pytest.approx(np.nan, nan_ok=True)] * 2}
    triangles = [line for line in ax.get_lines() if line.get_marker() == "^"]
    bounds = {(line.get_color(), y) for line in triangles for y in line.get_ydata()}
    # censored: near progress, far none, far progress, each drawn at the 16,000-step budget
    assert bounds == {(colours["none"], BUDGET), (colours["progress"], BUDGET)}
    assert sum(len(line.get_ydata()) for line in triangles) == 3


def test_overview_is_byte_identical_for_the_same_data(overview):
    (first, second), _ = overview
    assert (first / "report.md").read_text() == (second / "report.md").read_text()
    pictures = re.findall(r"\]\(([^)]+\.png)\)", (first / "report.md").read_text())
    assert pictures == [SETTINGS_FIGURE]
    png = (first / SETTINGS_FIGURE).read_bytes()
    assert png.startswith(PNG_SIGNATURE) and png == (second / SETTINGS_FIGURE).read_bytes()


def test_settings_without_distinct_numbers_sit_in_order():
    def setting(**values) -> TaskSetting:
        return TaskSetting(values, "", Study(Path("."), [], []))

    ranges = [setting(**{"task.start_distance_m": (5.0, 20.0)}), setting(**{"task.start_distance_m": (10.0, 20.0)})]
    # the same far end (20): positions 0 and 1, labelled by the ranges
    assert setting_axis(ranges) == ([0.0, 1.0], ["[5.0, 20.0]", "[10.0, 20.0]"], "task setting (in order)")
    numbers = [setting(**{"task.delay_steps": 2}), setting(**{"task.delay_steps": 0})]
    assert setting_axis(numbers) == ([2.0, 0.0], ["2", "0"], "task.delay_steps")
    two_keys = [setting(**{"task.a": 1, "task.b": "x"}), setting(**{"task.a": 2, "task.b": "y"})]
    assert setting_axis(two_keys) == ([0.0, 1.0], ["a=1, b=x", "a=2, b=y"], "task setting (in order)")


def test_budget_line_follows_each_settings_budget():
    from types import SimpleNamespace

    import matplotlib.pyplot as plt

    def arm(budget):
        return {"tabular": {"none": SimpleNamespace(budget=budget)}}

    fig, (level, rising) = plt.subplots(1, 2)
    try:
        assert figures._budget_line(level, [25.0, 60.0], [arm(30_000), arm(30_000)], "tabular") == 30_000
        assert list(level.lines[0].get_ydata()) == [30_000, 30_000]  # axhline: one level across the panel
        assert figures._budget_line(rising, [60.0, 25.0], [arm(80_000), arm(30_000)], "tabular") == 80_000
        line = rising.lines[0]
        assert list(line.get_xdata()) == [25.0, 60.0] and list(line.get_ydata()) == [30_000, 80_000]
    finally:
        plt.close(fig)
