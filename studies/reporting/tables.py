"""The result tables as the dashboard and the report show them.

Django-free. :data:`SHOWN` says which stored tables are shown, with their title and the
columns on screen (the CSV download always has every column); :func:`readers_table`
folds the per-reader tables (bias, repeatability, drift) into one row per reader.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

__all__ = ["CSV_TABLES", "SHOWN", "TableInputError", "cell_text", "drift_state",
           "readers_table"]

#: p below this counts as a significant bias or trend in the readers table.
ALPHA = 0.05

#: Shown tables: name -> (title, columns on screen).
SHOWN: dict[str, tuple[str, tuple[str, ...]]] = {
    "agreement_by_landmark": ("Agreement by landmark", (
        "landmark", "n_cases", "mean_pairwise_mm", "median_pairwise_mm", "p95_pairwise_mm",
        "icc2_1_x", "icc2_1_y", "icc2_1_z", "kappa_absent", "reason")),
    "consensus": ("Consensus points", (
        "case", "landmark", "method", "x_mm", "y_mm", "z_mm", "se_mm", "n_readers",
        "n_absent", "flagged", "reasons", "note")),
    "readers": ("Readers", (
        "reader", "n_landmarks", "median_bias_mm", "max_bias_mm", "n_biased_landmarks",
        "n_repeat_pairs", "median_rc_mm", "slope_mm_per_week", "mann_kendall_p",
        "cusum_alarms", "cusum_first_alarm_at", "drift_state")),
    "detector": ("Detector scores", (
        "landmark", "rater", "n", "mre_mm", "sd_mm", "median_mm", "sdr_2mm", "sdr_2_5mm",
        "sdr_3mm", "sdr_4mm", "reason")),
    "williams": ("Williams index", (
        "landmark", "williams_index", "ci_low", "ci_high", "se", "verdict")),
}
#: Every table that can be downloaded as CSV (stored tables plus the readers table).
CSV_TABLES = ("agreement_by_landmark", "agreement_by_case", "consensus", "repeatability",
              "reader_bias", "drift", "readers", "detector", "williams")


class TableInputError(ValueError):
    """A table lacks a column it needs; the message names it."""


def _need(frame: pd.DataFrame, columns: list[str], what: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise TableInputError(f"the {what} table lacks column(s) {missing}")


def drift_state(alarms: int, slope_low: float, slope_high: float) -> str:
    """'alarm' when the CUSUM alarmed, 'trend' when the slope's CI excludes 0, else 'stable'."""
    if alarms and alarms > 0:
        return "alarm"
    if np.isfinite(slope_low) and np.isfinite(slope_high) and (slope_low > 0 or slope_high < 0):
        return "trend"
    return "stable"


def readers_table(bias: pd.DataFrame, repeatability: pd.DataFrame, drift: pd.DataFrame
                  ) -> pd.DataFrame:
    """One row per reader: bias, repeatability and drift side by side.

    Parameters
    ----------
    bias, repeatability, drift : pandas.DataFrame
        The stored reader_bias, repeatability and drift tables.

    Returns
    -------
    pandas.DataFrame
        reader, n_landmarks, median_bias_mm and max_bias_mm (length of the mean residual
        over landmarks), n_biased_landmarks (Hotelling T^2 p < 0.05), n_repeat_pairs,
        median_rc_mm (median over landmarks and axes of the repeatability coefficient),
        slope_mm_per_week, slope_ci_low, slope_ci_high, mann_kendall_p, cusum_alarms,
        cusum_first_alarm_at, drift_state ("alarm", "trend" or "stable").
    """
    _need(bias, ["reader", "landmark", "bias_mm", "t2_p_value"], "reader_bias")
    _need(repeatability, ["reader", "n_pairs", "rc_x_mm", "rc_y_mm", "rc_z_mm"], "repeatability")
    _need(drift, ["reader", "slope_mm_per_week", "slope_ci_low", "slope_ci_high",
                  "mann_kendall_p", "cusum_alarms", "cusum_first_alarm_at"], "drift")
    readers = sorted({str(r) for r in pd.concat([bias["reader"], drift["reader"]])})
    rows = []
    for reader in readers:
        b = bias[bias["reader"].astype(str) == reader]
        r = repeatability[repeatability["reader"].astype(str) == reader]
        d = drift[drift["reader"].astype(str) == reader]
        lengths = pd.to_numeric(b["bias_mm"], errors="coerce").dropna()
        p = pd.to_numeric(b["t2_p_value"], errors="coerce")
        rc = pd.to_numeric(pd.concat([r[f"rc_{a}_mm"] for a in "xyz"]), errors="coerce").dropna()
        row = {
            "reader": reader, "n_landmarks": int(lengths.size),
            "median_bias_mm": float(lengths.median()) if lengths.size else math.nan,
            "max_bias_mm": float(lengths.max()) if lengths.size else math.nan,
            "n_biased_landmarks": int((p < ALPHA).sum()),
            "n_repeat_pairs": int(pd.to_numeric(r["n_pairs"], errors="coerce").fillna(0).sum()),
            "median_rc_mm": float(rc.median()) if rc.size else math.nan,
        }
        if len(d):
            first = d.iloc[0]
            for key in ("slope_mm_per_week", "slope_ci_low", "slope_ci_high", "mann_kendall_p"):
                row[key] = _float(first[key])
            row["cusum_alarms"] = int(_float(first["cusum_alarms"]) or 0)
            row["cusum_first_alarm_at"] = first["cusum_first_alarm_at"] or ""
        else:
            row.update(slope_mm_per_week=math.nan, slope_ci_low=math.nan,
                       slope_ci_high=math.nan, mann_kendall_p=math.nan, cusum_alarms=0,
                       cusum_first_alarm_at="")
        row["drift_state"] = drift_state(row["cusum_alarms"], row["slope_ci_low"],
                                         row["slope_ci_high"])
        rows.append(row)
    return pd.DataFrame(rows, columns=["reader", "n_landmarks", "median_bias_mm", "max_bias_mm",
                                       "n_biased_landmarks", "n_repeat_pairs", "median_rc_mm",
                                       "slope_mm_per_week", "slope_ci_low", "slope_ci_high",
                                       "mann_kendall_p", "cusum_alarms",
                                       "cusum_first_alarm_at", "drift_state"])


def _float(value: object) -> float:
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan
    return out


def cell_text(value: object) -> str:
    """A cell as shown on screen: floats to 3 significant decimals, None/NaN as a dash."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "\u2013"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if value != 0 and abs(value) < 0.001:
            return f"{value:.2e}"
        return f"{value:.3f}"
    return str(value)
