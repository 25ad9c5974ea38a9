"""Small seeded placements tables for the analysis tests (invented readers, synthetic points)."""

from __future__ import annotations

import numpy as np
import pandas as pd

COLUMNS = ["case", "landmark", "reader", "read", "x_mm", "y_mm", "z_mm", "absent", "placed_at"]


def make_placements(
    n_cases: int = 12,
    n_landmarks: int = 3,
    n_readers: int = 4,
    *,
    sd_mm: float | np.ndarray = 1.0,
    repeat_cases: int = 4,
    repeat_sd_mm: float = 0.5,
    absent_rate: float = 0.0,
    seed: int = 20261201,
) -> tuple[pd.DataFrame, np.ndarray]:
    """A fully crossed study: every reader reads every case; some cases are read twice.

    Returns the placements table and the true points, (n_cases, n_landmarks, 3) world mm.
    ``sd_mm`` may be a scalar or an (n_landmarks, n_readers) array of per-axis SDs.
    """
    rng = np.random.default_rng(seed)
    truth = rng.uniform(-60.0, 60.0, size=(n_cases, n_landmarks, 3))
    sd = np.broadcast_to(np.asarray(sd_mm, dtype=np.float64), (n_landmarks, n_readers))
    c, lm, r = np.meshgrid(np.arange(n_cases), np.arange(n_landmarks), np.arange(n_readers),
                           indexing="ij")
    c, lm, r = c.ravel(), lm.ravel(), r.ravel()
    pts = truth[c, lm] + rng.normal(size=(c.size, 3)) * sd[lm, r][:, None]
    absent = rng.random(c.size) < absent_rate
    pts[absent] = np.nan
    start = pd.Timestamp("2026-03-02T09:00:00Z")
    times = start + pd.to_timedelta(c * 3600 + r * 60 + lm * 5, unit="s")
    first = pd.DataFrame({
        "case": [f"case{v:03d}" for v in c], "landmark": [f"LM{v}" for v in lm],
        "reader": [f"reader_{chr(97 + v)}" for v in r], "read": 1,
        "x_mm": pts[:, 0], "y_mm": pts[:, 1], "z_mm": pts[:, 2],
        "absent": absent.astype(int), "placed_at": times,
    })
    rep = first[c < repeat_cases].copy()
    rep["read"] = 2
    moved = rep[["x_mm", "y_mm", "z_mm"]].to_numpy() + rng.normal(size=(len(rep), 3)) * repeat_sd_mm
    rep[["x_mm", "y_mm", "z_mm"]] = moved
    rep["placed_at"] = rep["placed_at"] + pd.Timedelta(days=21)
    return pd.concat([first, rep], ignore_index=True)[COLUMNS], truth


def as_csv_text(df: pd.DataFrame) -> pd.DataFrame:
    """The table as the CSV reader sees it: every cell text, empty for missing values."""
    out = df.copy()
    out["placed_at"] = pd.to_datetime(out["placed_at"], utc=True).dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    return out.astype(object).where(out.notna(), "").astype(str).replace("nan", "")
