"""Report figures (matplotlib, Agg canvas, no pyplot state): one colour per shaping arm everywhere.

Every function returns a :class:`matplotlib.figure.Figure`; :func:`save_png` writes it small.
"""

from __future__ import annotations

import zlib
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import NullFormatter
from PIL import Image

from qlab.compare.diagnostics import LQMaps, ValueMaps
from qlab.compare.measures import ArmMeasures, Band, Estimate
from qlab.compare.runs import START_AT_POTENTIAL_ARM, arm_sort_key

#: colour of each known arm (Okabe & Ito colour-blind-safe palette), used by every figure
ARM_COLOURS = {
    "none": "#3b3b3b",
    START_AT_POTENTIAL_ARM: "#009e73",
    "potential": "#0072b2",
    "potential_ahead": "#56b4e9",
    "progress": "#d55e00",
}
_OTHER_COLOURS = ("#cc79a7", "#e69f00", "#56b4e9", "#a08c00")
DPI = 110
PANEL = (4.2, 3.0)  # inches per panel
STEPS_LABEL = "environment steps"
SUCCESS_LABEL = "success rate (fraction of episodes)"
RETURN_LABEL = "discounted return (task's own reward, unitless)"


def arm_colour(arm: str) -> str:
    """The colour of ``arm``: fixed for known arms, a stable pick from spare colours otherwise."""
    return ARM_COLOURS.get(arm) or _OTHER_COLOURS[zlib.crc32(arm.encode()) % len(_OTHER_COLOURS)]


def _figure(n_panels: int, height: float = PANEL[1], width: float = PANEL[0]) -> tuple[Figure, list]:
    fig = Figure(figsize=(width * n_panels, height), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, n_panels, squeeze=False)[0]
    for ax in axes:
        _style(ax)
    return fig, list(axes)


def _style(ax) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(True, axis="y", color="#e4e4e4", linewidth=0.8)
    ax.set_axisbelow(True)
    ax.tick_params(labelsize=8)
    ax.xaxis.label.set_size(8.5)
    ax.yaxis.label.set_size(8.5)


def _title(ax, text: str) -> None:
    ax.set_title(text, loc="left", fontsize=9.5, fontweight="bold")


def band_figure(
    panels: dict[str, dict[str, Band]], xlabel: str, ylabel: str, ylim: tuple[float, float] | None = None,
    zero_line: bool = False,
) -> Figure:
    """One panel per learner, one line per arm: the band's centre with its interval shaded."""
    fig, axes = _figure(max(len(panels), 1))
    for ax, (learner, arms) in zip(axes, panels.items(), strict=False):
        for arm, band in arms.items():
            colour = arm_colour(arm)
            ax.fill_between(band.x, band.low, band.high, color=colour, alpha=0.18, linewidth=0)
            ax.plot(band.x, band.centre, color=colour, linewidth=1.6, label=arm)
        if zero_line:
            ax.axhline(0.0, color="#888888", linewidth=0.8, linestyle="--")
        if ylim is not None:
            ax.set_ylim(*ylim)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        _title(ax, learner)
        ax.legend(fontsize=7.5, frameon=False)
    return fig


def interval_figure(
    panels: list[tuple[str, dict[tuple[str, str], Estimate]]], reference: float | None = None,
    xlim: tuple[float, float] | None = None,
) -> Figure:
    """Dot-and-interval rows (one per learner and arm), one panel per measure titled by its label."""
    rows = list(dict.fromkeys(key for _, entries in panels for key in entries))
    fig, axes = _figure(max(len(panels), 1), height=0.9 + 0.28 * len(rows))
    for ax, (label, entries) in zip(axes, panels, strict=False):
        ax.grid(False)
        ax.grid(True, axis="x", color="#e4e4e4", linewidth=0.8)
        for y, key in enumerate(rows):
            if key not in entries:
                continue
            e = entries[key]
            colour = arm_colour(key[1])
            ax.plot([e.low, e.high], [y, y], color=colour, linewidth=2.2, solid_capstyle="butt")
            ax.plot([e.value], [y], "o", color=colour, markersize=5.5, label=key[1])
        if reference is not None:
            ax.axvline(reference, color="#888888", linewidth=0.8, linestyle="--")
        if xlim is not None:
            ax.set_xlim(*xlim)
        ax.set_yticks(range(len(rows)), [f"{learner} / {arm}" for learner, arm in rows])
        ax.set_ylim(len(rows) - 0.5, -0.5)
        ax.set_xlabel(label)
    return fig


#: a value axis spanning more than this factor (largest over smallest value drawn) is drawn on a log scale
#: (common practice, no source)
LOG_SPAN = 10.0
#: horizontal offset between neighbouring arms at one setting, as a share of the closest settings' spacing
DODGE = 0.06


def _dodged(xs: list[float], n_arms: int) -> np.ndarray:
    """Offsets that keep the arms drawn at one setting apart, centred on the setting (shape ``(n_arms,)``)."""
    spacing = float(np.min(np.diff(sorted(xs)))) if len(xs) > 1 else 1.0
    return (np.arange(n_arms) - (n_arms - 1) / 2.0) * DODGE * spacing


def _arm_at_settings(ax, x: np.ndarray, ms: list[ArmMeasures], colour: str, arm: str) -> list[float]:
    """One arm across the settings: medians joined by a line with interval bars, censored medians as open
    triangles pointing up at the budget. Returns the values drawn (for the axis scale)."""
    censored = np.array([m.median_censored for m in ms])
    centre = np.array([np.nan if c else m.median_threshold_steps() for c, m in zip(censored, ms, strict=True)])
    ax.plot(x, centre, "o-", color=colour, linewidth=1.6, markersize=5, label=arm, zorder=3)
    top = np.array([m.budget for m in ms], dtype=np.float64)
    ends = np.array([m.steps_interval if m.steps_interval else (np.nan, np.nan) for m in ms])
    ax.vlines(x, ends[:, 0], np.fmin(ends[:, 1], top), color=colour, linewidth=1.2, zorder=2)
    capped = np.where(np.isinf(ends), np.nan, ends)  # an open end gets no cap: its bar runs into the budget line
    ax.plot(np.repeat(x, 2), capped.ravel(), "_", color=colour, markersize=7, markeredgewidth=1.2, zorder=2)
    ax.plot(x[censored], top[censored], "^", color=colour, markerfacecolor="white", markeredgewidth=1.4,
            markersize=7, linestyle="none", zorder=4)
    drawn = np.concatenate([centre, ends.ravel(), top[censored]])
    return drawn[np.isfinite(drawn)].tolist()


def settings_figure(
    positions: list[float], ticks: list[str], xlabel: str, measures: list[dict[str, dict[str, ArmMeasures]]],
    threshold: float,
) -> Figure:
    """Median steps to threshold against the task setting, one panel per learner, one line per arm.

    ``measures[i]`` are the measures of the setting drawn at ``positions[i]`` (tick label ``ticks[i]``).
    Filled circles: medians, with their bootstrap interval as a capped bar (no cap at the top: no upper
    end, the bar cut at the budget); open triangles pointing up at the budget (dashed, each setting's own
    where the settings' budgets differ): censored medians, lower bounds.
    The value axis is logarithmic when the values drawn span more than :data:`LOG_SPAN`.
    """
    learners = sorted({lr for ms in measures for lr in ms})
    fig, axes = _figure(len(learners), height=PANEL[1] + 0.4, width=PANEL[0] + 1.4)
    for ax, learner in zip(axes, learners, strict=True):
        arms = sorted({a for ms in measures for a in ms.get(learner, {})}, key=arm_sort_key)
        drawn = []
        for offset, arm in zip(_dodged(positions, len(arms)), arms, strict=True):
            x, ms = _arm_settings(positions, measures, learner, arm)
            drawn += _arm_at_settings(ax, x + offset, ms, arm_colour(arm), arm)
        budget = _budget_line(ax, positions, measures, learner)
        if min(drawn) > 0 and max(drawn) > LOG_SPAN * min(drawn):
            _log_steps_axis(ax)
        else:
            ax.set_ylim(0.0, 1.08 * budget)
        ax.set_xticks(positions, ticks)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(f"median environment steps to success >= {threshold:g}")
        _title(ax, f"{learner} (dashed: budget)")
        bound = Line2D([], [], color="#555555", marker="^", markerfacecolor="white", linestyle="none",
                       label="median > budget")
        ax.legend(handles=[*ax.get_legend_handles_labels()[0], bound], fontsize=7.5, frameon=False,
                  loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return fig


def _budget_line(ax, positions: list[float], measures: list[dict[str, dict[str, ArmMeasures]]], learner: str) -> int:
    """The dashed budget line of one panel: level where every setting has the same budget, else through each
    setting's budget (a study may fix a longer budget for a longer delay). Returns the largest budget."""
    at = sorted((p, max(m.budget for m in ms[learner].values()))
                for p, ms in zip(positions, measures, strict=True) if ms.get(learner))
    budgets = [b for _, b in at]
    dashed = {"color": "#888888", "linewidth": 0.8, "linestyle": "--", "zorder": 1}
    if len(set(budgets)) == 1:
        ax.axhline(budgets[0], **dashed)
    else:
        ax.plot([p for p, _ in at], budgets, marker="_", markersize=12, **dashed)
    return max(budgets)


def _log_steps_axis(ax) -> None:
    """A logarithmic step axis labelled in plain numbers at 1, 2 and 5 times powers of ten."""
    ax.set_yscale("log")
    low, high = ax.get_ylim()
    powers = 10.0 ** np.arange(np.floor(np.log10(low)), np.ceil(np.log10(high)) + 1)
    ticks = [t for t in np.outer(powers, [1.0, 2.0, 5.0]).ravel() if low <= t <= high]
    ax.set_yticks(ticks, [f"{t:,.0f}" for t in ticks])
    ax.yaxis.set_minor_formatter(NullFormatter())


def _arm_settings(
    positions: list[float], measures: list[dict[str, dict[str, ArmMeasures]]], learner: str, arm: str,
) -> tuple[np.ndarray, list[ArmMeasures]]:
    """The positions of the settings in which ``learner`` ran ``arm``, and its measures there."""
    at = [(p, ms[learner][arm]) for p, ms in zip(positions, measures, strict=True) if arm in ms.get(learner, {})]
    return np.array([p for p, _ in at], dtype=np.float64), [m for _, m in at]


def _map_image(ax, data: np.ndarray, extent: tuple, cmap, lo: float, hi: float, labels: tuple[str, str],
               title: str):
    """One map panel: ``data`` indexed ``[x, y]`` drawn over ``extent`` with labelled axes."""
    image = ax.imshow(data.T, origin="lower", aspect="auto", extent=extent, cmap=cmap, vmin=lo, vmax=hi,
                      interpolation="nearest")
    ax.set_xlabel(labels[0], fontsize=8.5)
    ax.set_ylabel(labels[1], fontsize=8.5)
    ax.tick_params(labelsize=8)
    _title(ax, title)
    return image


def _value_pair(fig: Figure, row, extent: tuple, learned: np.ndarray, optimal: np.ndarray, labels: tuple[str, str],
                titles: tuple[str, str], run: str) -> None:
    """Learned V and V* side by side on one colour scale, with the run's name underneath."""
    both = np.concatenate([learned.ravel(), optimal.ravel()])
    both = both[np.isfinite(both)]
    vmin, vmax = (float(both.min()), float(both.max())) if both.size else (0.0, 1.0)
    image = _map_image(row[0], learned, extent, "viridis", vmin, vmax, labels, titles[0])
    _map_image(row[1], optimal, extent, "viridis", vmin, vmax, labels, titles[1])
    fig.colorbar(image, ax=list(row[:2]), shrink=0.85, label="value (unitless)").ax.tick_params(labelsize=7)
    row[0].annotate(f"run {run}", (0.0, -0.32), xycoords="axes fraction", fontsize=7, color="#555555")


def _map_grid(n_rows: int) -> tuple[Figure, np.ndarray]:
    fig = Figure(figsize=(11.5, 2.7 * n_rows + 0.3), layout="constrained")
    FigureCanvasAgg(fig)
    return fig, fig.subplots(n_rows, 3, squeeze=False)


def value_map_figure(learner: str, maps: list[tuple[str, str, ValueMaps]]) -> Figure:
    """Rows of (arm, run name, maps); columns learned V, V* of the training reward, greedy actions not optimal."""
    fig, axes = _map_grid(len(maps))
    flags = ListedColormap(["#f2f2f2", "#c0392b"])
    labels = ("position (m)", "velocity (m/s)")
    for row, (arm, run, m) in zip(axes, maps, strict=True):
        extent = (m.positions_m[0], m.positions_m[-1], m.velocities_m_s[0], m.velocities_m_s[-1])
        _value_pair(fig, row, extent, m.learned_v, m.optimal_v, labels,
                    (f"{learner} / {arm}: learned V", "V* of its training reward"), run)
        _map_image(row[2], m.disagreement.astype(float), extent, flags, 0.0, 1.0, labels,
                   f"red: greedy action not optimal ({np.mean(m.disagreement):.0%})")
    return fig


def lq_value_map_figure(learner: str, maps: list[tuple[str, str, LQMaps]]) -> Figure:
    """Linear-quadratic rows of (arm, run name, maps); columns learned V, V*, distance of the greedy control from u*."""
    fig, axes = _map_grid(len(maps))
    for row, (arm, run, m) in zip(axes, maps, strict=True):
        extent = (m.x1[0], m.x1[-1], m.x2[0], m.x2[-1])
        _value_pair(fig, row, extent, m.learned_v, m.optimal_v, m.labels,
                    (f"{learner} / {arm}: learned V", "V* (closed form)"), run)
        finite = m.action_distance[np.isfinite(m.action_distance)]
        top = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
        image = _map_image(row[2], m.action_distance, extent, "magma_r", 0.0, top, m.labels,
                           "|greedy control - u*|")
        fig.colorbar(image, ax=row[2], shrink=0.85, label="|u - u*| (control units)").ax.tick_params(
            labelsize=7)
    return fig


def save_png(fig: Figure, path: Path) -> Path:
    """Write ``fig`` as a small PNG: modest resolution, reduced to a 256-colour palette."""
    fig.set_dpi(DPI)
    fig.patch.set_facecolor("white")
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    image = Image.fromarray(np.asarray(canvas.buffer_rgba())).convert("RGB")
    image.quantize(colors=256).save(path, format="PNG", optimize=True, dpi=(DPI, DPI))
    return path


def save_figure(fig: Figure, folder: Path, name: str) -> str:
    """Save ``fig`` as ``folder/name`` (see :func:`save_png`); returns the Markdown line that shows it."""
    save_png(fig, folder / name)
    return f"![{name.removesuffix('.png')}]({name})"
