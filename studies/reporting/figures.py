"""The result figures, drawn with matplotlib as SVG text (the same files go into the report).

Each ``*_figure`` function takes tables or arrays and returns a matplotlib Figure; the
matching ``*_svg`` function returns its SVG text. Output is deterministic: the same data
give the same bytes (fixed ``svg.hashsalt``, no date in the metadata, seeded jitter).
Lines and markers that carry a number have a ``gid`` so the SVG can be checked.
Coordinates and distances are world mm, RAS+.
"""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.patches import Circle

from ..analysis.detection import success_rate_curve
from .quantities import AXES, ErrorSeries, ReportingInputError, limits_of_agreement

__all__ = [
    "FIGURE_NAMES",
    "bland_altman_figure",
    "bland_altman_svg",
    "distance_figure",
    "distance_svg",
    "error_time_figure",
    "error_time_svg",
    "points_figure",
    "points_svg",
    "success_figure",
    "success_svg",
    "svg_text",
]

#: The figure kinds of the dashboard and the report.
FIGURE_NAMES = ("distances", "pair", "repeat", "drift", "points", "success")
#: Reader colours and markers (paired, so each reader differs in both).
COLOURS = ("#2b6f8f", "#b4582f", "#5a7d2a", "#7a4f9a", "#8a6d1f", "#3d5a6b", "#a23b5b")
MARKERS = ("o", "s", "^", "D", "v", "P", "X")
INK, SOFT, ACCENT = "#1f2328", "#57606a", "#b4582f"
#: The three orthogonal projections: (name, horizontal axis, vertical axis).
PROJECTIONS = (("axial", "x", "y"), ("coronal", "x", "z"), ("sagittal", "y", "z"))
SUCCESS_RADII_MM = np.linspace(0.0, 5.0, 101)
_RC = {"svg.hashsalt": "cairn", "font.size": 9, "axes.titlesize": 10,
       "axes.edgecolor": SOFT, "axes.labelcolor": INK, "xtick.color": SOFT,
       "ytick.color": SOFT, "axes.spines.top": False, "axes.spines.right": False}


def svg_text(fig: Figure) -> str:
    """The figure as SVG text, byte-identical for identical figures."""
    buffer = io.StringIO()
    with matplotlib.rc_context(_RC):
        fig.savefig(buffer, format="svg", metadata={"Date": None}, bbox_inches="tight")
    return buffer.getvalue()


def _figure(width_in: float, height_in: float) -> Figure:
    with matplotlib.rc_context(_RC):
        return Figure(figsize=(width_in, height_in), layout="constrained")


def _need(frame: pd.DataFrame, columns: Sequence[str], what: str) -> None:
    if not isinstance(frame, pd.DataFrame):
        raise ReportingInputError(f"{what} must be a DataFrame, got {type(frame).__name__!r}")
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ReportingInputError(f"{what} lacks column(s) {missing}; has {list(frame.columns)}")


def _empty(ax, message: str) -> None:
    ax.text(0.5, 0.5, message, ha="center", va="center", color=SOFT, transform=ax.transAxes)
    ax.set_xticks([])
    ax.set_yticks([])


def distance_figure(pairwise: pd.DataFrame) -> Figure:
    """Distribution of inter-reader distances per landmark: box plot with every pair.

    Parameters
    ----------
    pairwise : pandas.DataFrame
        landmark, distance_mm (:func:`studies.reporting.quantities.pairwise_long`).
    """
    _need(pairwise, ["landmark", "distance_mm"], "pairwise")
    landmarks = sorted({str(v) for v in pairwise["landmark"]})
    with matplotlib.rc_context(_RC):
        fig = _figure(7.0, 3.2)
        ax = fig.add_subplot()
        if not landmarks:
            _empty(ax, "no landmark was placed by two readers yet")
            return fig
        groups = [pairwise.loc[pairwise["landmark"].astype(str) == lm, "distance_mm"]
                  .to_numpy(dtype=np.float64) for lm in landmarks]
        ax.boxplot(groups, tick_labels=landmarks, widths=0.5, showfliers=False,
                   medianprops={"color": ACCENT, "linewidth": 1.6},
                   boxprops={"color": SOFT}, whiskerprops={"color": SOFT},
                   capprops={"color": SOFT})
        rng = np.random.default_rng(0)
        for i, values in enumerate(groups, start=1):
            jitter = rng.uniform(-0.18, 0.18, size=values.size)
            ax.plot(i + jitter, values, "o", ms=2.8, color=COLOURS[0], alpha=0.55,
                    gid=f"distances-{landmarks[i - 1]}")
        ax.set_ylabel("distance between two readers (mm)")
        ax.set_ylim(bottom=0)
        ax.set_title("Inter-reader distance per landmark (first reads)")
    return fig


def bland_altman_figure(pairs: pd.DataFrame, title: str, z: float = 1.96) -> Figure:
    """Bland-Altman plots per axis: difference against mean, bias and limits of agreement.

    Parameters
    ----------
    pairs : pandas.DataFrame
        axis ("x", "y", "z"), mean_mm, difference_mm
        (:func:`~studies.reporting.quantities.reader_pair_differences` or
        :func:`~studies.reporting.quantities.repeat_differences`).
    title : str
        Figure title, e.g. "ada minus ben".
    z : float, default 1.96
        SD multiple of the limits.

    Notes
    -----
    Each panel draws the mean difference (gid ``bias-<axis>``) and the limits of
    agreement bias +/- z SD (gids ``low-<axis>`` and ``high-<axis>``), labelled with their
    values (Bland & Altman 1986).
    """
    _need(pairs, ["axis", "mean_mm", "difference_mm"], "pairs")
    with matplotlib.rc_context(_RC):
        fig = _figure(8.0, 2.9)
        axes = fig.subplots(1, 3)
        for ax, axis in zip(axes, AXES, strict=True):
            part = pairs[pairs["axis"] == axis]
            lim = limits_of_agreement(part["difference_mm"], z=z)
            ax.set_title(f"{axis} (mm)")
            ax.set_xlabel(f"mean of the two {axis} (mm)")
            if lim.n < 2:
                _empty(ax, "fewer than 2 pairs")
                continue
            ax.plot(part["mean_mm"], part["difference_mm"], "o", ms=3, color=COLOURS[0],
                    alpha=0.7, gid=f"pairs-{axis}")
            for name, value, style in (("bias", lim.bias, "-"), ("low", lim.low, "--"),
                                       ("high", lim.high, "--")):
                ax.axhline(value, color=ACCENT if name == "bias" else SOFT, linestyle=style,
                           linewidth=1.2, gid=f"{name}-{axis}")
                ax.annotate(f"{value:.2f}", xy=(1.0, value), xycoords=("axes fraction", "data"),
                            xytext=(2, 0), textcoords="offset points", va="center",
                            fontsize=8, color=SOFT)
        axes[0].set_ylabel("difference (mm)")
        fig.suptitle(f"{title}: mean difference and {z:g} SD limits of agreement")
    return fig


def error_time_figure(series: ErrorSeries, reader: str) -> Figure:
    """A reader's standardised error over time with its trend line, and the CUSUM chart.

    Parameters
    ----------
    series : ErrorSeries
        From :func:`studies.reporting.quantities.error_series`.
    reader : str
        Reader name for the title.
    """
    with matplotlib.rc_context(_RC):
        fig = _figure(7.0, 5.0)
        top, bottom = fig.subplots(2, 1)
        top.set_title(f"{reader}: standardised error over time")
        if series.z.size < 2:
            _empty(top, "fewer than 2 placements with a consensus")
            _empty(bottom, "")
            return fig
        top.plot(series.weeks, series.z, "o", ms=2.8, color=COLOURS[0], alpha=0.6, gid="errors")
        if np.isfinite(series.trend.slope):
            ends = np.array([series.weeks.min(), series.weeks.max()])
            top.plot(ends, series.trend.intercept + series.trend.slope * ends, "-",
                     color=ACCENT, linewidth=1.6, gid="trend",
                     label=f"trend {series.trend.slope:+.2f} per week")
            top.legend(loc="upper left", frameon=False, fontsize=8)
        top.axhline(0.0, color=SOFT, linewidth=0.6)
        top.set_ylabel("standardised error")
        top.set_xlabel("weeks since the reader's first placement")
        order = np.arange(1, series.z.size + 1)
        bottom.plot(order, series.cusum.upper, "-", color=COLOURS[1], gid="cusum-upper",
                    drawstyle="steps-post", label="upper sum C+")
        bottom.plot(order, series.cusum.lower, "-", color=COLOURS[2], gid="cusum-lower",
                    drawstyle="steps-post", label="lower sum C-")
        bottom.axhline(series.h, color=SOFT, linestyle="--", linewidth=1.0, gid="cusum-h",
                       label=f"decision interval h = {series.h:g}")
        alarms = series.cusum.alarm_index
        if alarms.size:
            peak = np.maximum(series.cusum.upper, series.cusum.lower)[alarms]
            bottom.plot(order[alarms], peak, "v", ms=7, color="#9b2c2c",
                        gid="cusum-alarms", label=f"alarm ({alarms.size})")
        bottom.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False, fontsize=8)
        bottom.set_ylabel("CUSUM")
        bottom.set_xlabel("placement number, in time order")
    return fig


def points_figure(points: pd.DataFrame, centre_mm: Sequence[float], tolerance_mm: float,
                  title: str) -> Figure:
    """Readers' points around the consensus in three orthogonal projections, in mm.

    Parameters
    ----------
    points : pandas.DataFrame
        reader, read, x_mm, y_mm, z_mm (world mm RAS+); repeat reads drawn hollow.
    centre_mm : (3,) sequence of float
        Consensus point, world mm.
    tolerance_mm : float
        Radius of the tolerance circle drawn around the consensus (gid ``tolerance-<view>``).
    title : str
        e.g. "C-XXXX, landmark NASION".
    """
    _need(points, ["reader", "read", "x_mm", "y_mm", "z_mm"], "points")
    if not np.isfinite(tolerance_mm) or tolerance_mm <= 0:
        raise ReportingInputError(f"tolerance_mm must be a number > 0, got {tolerance_mm!r}")
    centre = np.asarray(centre_mm, dtype=np.float64)
    readers = sorted({str(r) for r in points["reader"]})
    spread = np.abs(points[["x_mm", "y_mm", "z_mm"]].to_numpy(np.float64) - centre)
    half = max(tolerance_mm * 1.6, float(np.nanmax(spread)) * 1.15 if spread.size else 0.0)
    with matplotlib.rc_context(_RC):
        fig = _figure(8.4, 3.3)
        axes = fig.subplots(1, 3)
        for ax, (view, h_axis, v_axis) in zip(axes, PROJECTIONS, strict=True):
            ax.set_title(f"{view} ({h_axis}, {v_axis})")
            ax.set_aspect("equal")
            ax.set_xlabel(f"{h_axis} - consensus (mm)")
            ax.set_ylabel(f"{v_axis} - consensus (mm)")
            ax.add_patch(Circle((0, 0), tolerance_mm, fill=False, color=ACCENT, linewidth=1.2,
                                linestyle="--", gid=f"tolerance-{view}"))
            ax.plot([0], [0], "+", ms=12, mew=1.6, color=INK, gid=f"consensus-{view}")
            for i, reader in enumerate(readers):
                for read in (1, 2):
                    rows = points[(points["reader"].astype(str) == reader)
                                  & (points["read"] == read)]
                    if rows.empty:
                        continue
                    face = COLOURS[i % len(COLOURS)] if read == 1 else "none"
                    ax.plot(rows[f"{h_axis}_mm"] - centre["xyz".index(h_axis)],
                            rows[f"{v_axis}_mm"] - centre["xyz".index(v_axis)],
                            MARKERS[i % len(MARKERS)], ms=6, mfc=face,
                            mec=COLOURS[i % len(COLOURS)],
                            label=reader if read == 1 else f"{reader} (repeat)",
                            gid=f"reader-{view}-{reader}-{read}")
            ax.set_xlim(-half, half)
            ax.set_ylim(-half, half)
        handles, labels = axes[0].get_legend_handles_labels()
        if handles:
            fig.legend(handles, labels, loc="outside right center", frameon=False, fontsize=8)
        fig.suptitle(f"{title}: readers around the consensus (tolerance {tolerance_mm:g} mm)")
    return fig


def success_figure(errors_mm: Mapping[str, object], detector: str | None = None,
                   radii_mm: object = SUCCESS_RADII_MM) -> Figure:
    """Success rate against radius for the detector and each reader.

    Parameters
    ----------
    errors_mm : mapping of str to (n,) array-like, mm
        Rater name to radial errors (readers against the consensus of the others, the
        detector against the consensus of all).
    detector : str, optional
        The key of the detector, drawn as a thick dark line.
    radii_mm : (m,) array-like, mm
        Radii of the curve, 0 to 5 mm by default.

    Notes
    -----
    The success rate at radius r is the share of errors strictly below r
    (:func:`studies.analysis.detection.success_rate_curve`). Each line has the gid
    ``success-<rater>``.
    """
    radii = np.asarray(radii_mm, dtype=np.float64)
    with matplotlib.rc_context(_RC):
        fig = _figure(6.0, 3.6)
        ax = fig.add_subplot()
        if not errors_mm:
            _empty(ax, "no radial errors yet")
            return fig
        readers = [name for name in errors_mm if name != detector]
        for i, name in enumerate(readers):
            curve = success_rate_curve(errors_mm[name], radii)
            ax.plot(radii, curve, "-", color=COLOURS[i % len(COLOURS)], linewidth=1.4,
                    drawstyle="steps-post", label=name, gid=f"success-{name}")
        if detector is not None and detector in errors_mm:
            curve = success_rate_curve(errors_mm[detector], radii)
            ax.plot(radii, curve, "-", color=INK, linewidth=2.6, label=f"{detector} (detector)",
                    drawstyle="steps-post", gid=f"success-{detector}")
        ax.set_xlim(radii.min(), radii.max())
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("radius (mm)")
        ax.set_ylabel("share of points within the radius")
        ax.set_title("Success rate against radius")
        ax.legend(loc="lower right", frameon=False, fontsize=8)
    return fig


def distance_svg(pairwise: pd.DataFrame) -> str:
    return svg_text(distance_figure(pairwise))


def bland_altman_svg(pairs: pd.DataFrame, title: str, z: float = 1.96) -> str:
    return svg_text(bland_altman_figure(pairs, title, z))


def error_time_svg(series: ErrorSeries, reader: str) -> str:
    return svg_text(error_time_figure(series, reader))


def points_svg(points: pd.DataFrame, centre_mm: Sequence[float], tolerance_mm: float,
               title: str) -> str:
    return svg_text(points_figure(points, centre_mm, tolerance_mm, title))


def success_svg(errors_mm: Mapping[str, object], detector: str | None = None) -> str:
    return svg_text(success_figure(errors_mm, detector))
