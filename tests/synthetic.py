"""Invented test series (not the demo): correlated channels with known injected anomalies."""

from __future__ import annotations

import numpy as np
import pandas as pd


def correlated_series(n: int, seed: int = 0, period_s: int = 60) -> pd.DataFrame:
    """Three channels driven by one slow duty signal plus noise, on a fixed grid."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    duty = np.sin(2 * np.pi * t / 144) + 0.5 * np.sin(2 * np.pi * t / 37 + 1.0)
    a = 10 + 2.0 * duty + 0.15 * rng.standard_normal(n)
    b = 5 + 1.2 * duty + 0.5 * np.roll(duty, 3) + 0.1 * rng.standard_normal(n)
    c = 50 - 3.0 * duty + 0.3 * rng.standard_normal(n)
    times = pd.date_range("2026-01-05", periods=n, freq=f"{period_s}s")
    return pd.DataFrame({"time": times, "flow": a, "power": b, "temp": c})


def inject(df: pd.DataFrame, start: int, seed: int = 1):
    """Spikes, a level shift and a stuck sensor after `start`; returns (df, labels [n])."""
    rng = np.random.default_rng(seed)
    df = df.copy()
    n = len(df)
    labels = np.zeros(n, dtype=int)
    span = n - start
    for k in rng.choice(np.arange(start + 50, start + span // 4), size=6, replace=False):
        df.loc[k, "flow"] += 8.0
        labels[k] = 1
    shift = slice(start + span // 3, start + span // 3 + 150)
    df.loc[df.index[shift], "power"] += 2.5
    labels[shift] = 1
    stuck = slice(start + 2 * span // 3, start + 2 * span // 3 + 150)
    df.loc[df.index[stuck], "temp"] = float(df["temp"].iloc[stuck.start])
    labels[stuck] = 1
    return df, labels
