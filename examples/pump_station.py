"""Hollowmere booster station, pump P2: the invented demo data set for ganlet.

ALL VALUES ARE INVENTED. Hollowmere, its booster station and pump P2 do not exist; no reading
here was measured on any machine. The numbers are synthetic, shaped to look like the kind of
data a small water-booster pump produces, so that the ganlet pipeline has something realistic
to learn from and to catch. Do not use them as reference values for real equipment.

What the generator writes (`generate(out_dir)`):
- `station.csv`: columns `time` (ISO 8601, naive station-local time), `vibration_mm_s`
  (vibration velocity RMS, mm/s), `bearing_temp_c`, `discharge_bar` (gauge), `motor_current_a`.
  No label column.
- `incidents.csv`: columns `start,end,kind` (ISO times, both ends inclusive).

The story:
- P2 follows a daily demand pattern with three duty states: off (reservoir full, at night and
  a short spell after midday), low stage (~72 % speed) and high stage (full speed, morning and
  evening peaks). Switch times jitter from day to day.
- Current and discharge pressure follow the duty (pump affinity laws: pressure ~ speed^2,
  power ~ speed^3) with start/stop transients (inrush current, a pass through resonance, a small
  surge dip on stopping). Within a stage, a slow demand fluctuation moves flow: more flow means
  a little more current and a little less pressure.
- Bearing temperature = ambient (daily swing plus slow weather drift) + a first-order lagged
  response to load (time constant ~35 min).
- Vibration rises with speed; every channel has sensor noise and a small random drift.
- The first 60 % of the span is normal (training and calibration). Faults are injected only in
  the last 40 %: gradual bearing wear (lubrication starvation: vibration and bearing temperature
  ramp over hours until re-greasing; the incident includes ~1 h of cooling afterwards),
  cavitation bursts (short noisy vibration spikes with pressure dips), a stuck discharge-pressure
  sensor (frozen value while current keeps moving), and a pressure sag (discharge ~15 % low for
  ~1 h at normal current).
- Data-quality faults for intake to report: a few rows out of order, two duplicate timestamps
  (one exact re-send, one second poll with different values), a short gap of 3 missing samples
  (training span) and a ~40 min comms outage (start of the test span). A dead transmitter: the
  motor current's cells are blank for two hours in the test span, two hours after the incident
  followed by the longest quiet stretch (the gateway scores on without it, runtime/blanks.py).

Run as a script: `python examples/pump_station.py --out DIR [--days N] [--seed S] [--plot]`.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import List, Sequence, Tuple

import numpy as np
import pandas as pd

START = pd.Timestamp("2026-03-02T00:00:00")  # a Monday; naive station-local time (no DST in span)
CHANNELS = ("vibration_mm_s", "bearing_temp_c", "discharge_bar", "motor_current_a")
DEAD_TRANSMITTER = "motor_current_a"  # blank for two hours in the test span (_with_glitches)
TRAIN_FRACTION = 0.6  # faults only after this fraction of the span
TIME_FORMAT = "%Y-%m-%dT%H:%M:%S"
KINDS = ("bearing_wear", "cavitation", "stuck_sensor", "pressure_sag")
# The channels each kind of incident moves in _simulate (what an alert on it should name).
MOVES = {"bearing_wear": ("vibration_mm_s", "bearing_temp_c"),
         "cavitation": ("vibration_mm_s", "discharge_bar", "motor_current_a"),
         "stuck_sensor": ("discharge_bar",), "pressure_sag": ("discharge_bar",)}

# Duty states and their target speed (fraction of full speed).
OFF, LOW, HIGH = 0, 1, 2
SPEED = np.array([0.0, 0.72, 1.0])

# Daily switch times (hour of day), with the state entered at each; before the first switch the
# pump is in LOW (carried over from the previous evening).
SWITCH_HOURS = np.array([0.75, 4.5, 6.0, 9.0, 13.83, 14.5, 17.5, 21.5])
STATE_AFTER = np.array([LOW, OFF, LOW, HIGH, LOW, OFF, LOW, HIGH, LOW])
SWITCH_JITTER_MIN = np.array([20, 20, 20, 20, 8, 8, 20, 20])  # +- uniform, per day


def _fmt(ts: pd.Timestamp) -> str:
    return pd.Timestamp(ts).strftime(TIME_FORMAT)


def _first_order(x: np.ndarray, tau_s: float, period_s: float) -> np.ndarray:
    """Discrete first-order lag y[t] = y[t-1] + a (x[t] - y[t-1]), a = 1 - exp(-dt/tau)."""
    a = 1.0 - np.exp(-period_s / tau_s)
    return pd.Series(x).ewm(alpha=a, adjust=False).mean().to_numpy()


def _smooth_noise(rng: np.random.Generator, n: int, tau_s: float, period_s: float) -> np.ndarray:
    """Slowly varying noise with unit standard deviation."""
    y = _first_order(rng.standard_normal(n), tau_s, period_s)
    return (y - y.mean()) / (y.std() + 1e-12)


def _duty(rng: np.random.Generator, n: int, period_s: int) -> np.ndarray:
    """Duty state per sample from the jittered daily schedule."""
    t_s = np.arange(n) * float(period_s)
    day = (t_s // 86400).astype(int)
    hour = (t_s % 86400) / 3600.0
    ndays = int(day.max()) + 1
    jitter_h = rng.uniform(-1.0, 1.0, size=(ndays, len(SWITCH_HOURS))) * SWITCH_JITTER_MIN / 60.0
    switches = SWITCH_HOURS[None, :] + jitter_h
    passed = (hour[:, None] >= switches[day]).sum(axis=1)
    return STATE_AFTER[passed]


def _runs(state: np.ndarray) -> List[Tuple[int, int, int]]:
    """(start, end_exclusive, state) for each run of constant state."""
    change = np.flatnonzero(np.diff(state)) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [len(state)]])
    return [(int(s), int(e), int(state[s])) for s, e in zip(starts, ends)]


def _place_steady(state, earliest, dur, margin, allowed, limit) -> int:
    """First start >= earliest with the duty constant and in `allowed` over the window +- margin."""
    for s, e, st in _runs(state):
        if st not in allowed:
            continue
        t = max(earliest, s + margin)
        if t + dur + margin <= min(e, limit):
            return t
    raise ValueError("span too short to place every demo incident; use days >= 4")


def _place_across_change(state, earliest, pre, post, limit) -> int:
    """Start `pre` samples before the first duty change after earliest + pre (stuck sensor)."""
    for s, _, _ in _runs(state)[1:]:
        if s - pre >= earliest and s + post <= limit:
            return s - pre
    raise ValueError("span too short to place every demo incident; use days >= 4")


def _schedule(state: np.ndarray, test_idx: int, spm: float, rng: np.random.Generator):
    """Incidents as (kind, start_idx, end_idx_inclusive, params). spm = samples per minute."""
    n = len(state)
    m = lambda minutes: max(1, int(round(minutes * spm)))  # noqa: E731  minutes -> samples
    slot = int(0.08 * n)  # five incidents, one per 8 % of the span
    limit = n - m(30)
    out = []
    prev_end = test_idx + m(120)  # leave room for the comms outage at the start of the test span

    def earliest(k):
        return max(prev_end + m(60), test_idx + k * slot + m(120))

    # 1. bearing wear: ramp of up to 8 h, then ~1 h thermal tail after re-greasing.
    ramp = min(m(480), int(0.6 * slot))
    t0 = _place_steady(state, earliest(0), 0, 0, (OFF, LOW, HIGH), limit - ramp - m(60))
    out.append(("bearing_wear", t0, t0 + ramp + m(60) - 1, {"ramp_end": t0 + ramp}))
    prev_end = out[-1][2]

    # 2. and 4. cavitation: four short bursts in the high stage.
    def cavitation(k):
        lens = [m(v) for v in rng.uniform(2, 5, size=4)]
        gaps = [m(v) for v in rng.uniform(3, 8, size=3)]
        total = sum(lens) + sum(gaps)
        c0 = _place_steady(state, earliest(k), total, m(10), (HIGH,), limit)
        bursts, t = [], c0
        for i, ln in enumerate(lens):
            bursts.append((t, t + ln))
            t += ln + (gaps[i] if i < 3 else 0)
        return ("cavitation", c0, c0 + total - 1, {"bursts": bursts})

    out.append(cavitation(1))
    prev_end = out[-1][2]

    # 3. stuck discharge sensor across a duty change: 60 min before, 90 min after.
    s0 = _place_across_change(state, earliest(2), m(60), m(90), limit)
    out.append(("stuck_sensor", s0, s0 + m(150) - 1, {}))
    prev_end = out[-1][2]

    out.append(cavitation(3))
    prev_end = out[-1][2]

    # 5. pressure sag: ~15 % low for 60 min while running steadily.
    p0 = _place_steady(state, earliest(4), m(60), m(15), (LOW, HIGH), limit)
    out.append(("pressure_sag", p0, p0 + m(60) - 1, {}))
    return out


def _simulate(n: int, period_s: int, rng: np.random.Generator):
    """Clean, regular-grid signals plus the incident schedule."""
    spm = 60.0 / period_s
    t_s = np.arange(n) * float(period_s)
    hour = (t_s % 86400) / 3600.0
    test_idx = int(np.floor(TRAIN_FRACTION * n))

    state = _duty(rng, n, period_s)
    running = state > OFF
    target = SPEED[state]
    speed = _first_order(target, 60.0, period_s)  # soft-starter / drive ramp, ~1 min
    prev_running = np.concatenate([[running[0]], running[:-1]])
    start = running & ~prev_running
    stop = ~running & prev_running
    demand = _smooth_noise(rng, n, 20 * 60.0, period_s)  # flow fluctuation within a stage
    incidents = _schedule(state, test_idx, spm, rng)

    # Fault shapes on the regular grid.
    wear = np.zeros(n)
    cav = np.zeros(n, dtype=bool)
    sag = np.zeros(n)
    stuck = np.zeros(n, dtype=bool)
    for kind, a, b, p in incidents:
        if kind == "bearing_wear":
            r = p["ramp_end"]
            wear[a:r] = np.linspace(0.0, 1.0, r - a) ** 2  # accelerating wear
        elif kind == "cavitation":
            for s, e in p["bursts"]:
                cav[s:e] = True
        elif kind == "stuck_sensor":
            stuck[a : b + 1] = True
        elif kind == "pressure_sag":
            ramp = max(1, int(round(3 * spm)))
            shape = np.ones(b + 1 - a)
            shape[:ramp] = np.linspace(0.0, 1.0, ramp + 1)[1:]
            shape[-ramp:] = np.minimum(shape[-ramp:], np.linspace(1.0, 0.0, ramp + 1)[:-1])
            sag[a : b + 1] = shape

    # Motor current: power ~ speed^3; a 1-min average shows part of the inrush on start.
    current = np.where(running, 4.0 + 34.0 * speed**3 + 0.6 * demand * speed, 0.0)
    current += start * 0.45 * (4.0 + 34.0 * target**3)
    current -= cav * (1.5 + 0.5 * rng.standard_normal(n))

    # Discharge pressure: static head when off, + head ~ speed^2, a small surge dip on stopping.
    pressure = 1.4 + 4.6 * speed**2 - 0.12 * demand * speed**2 - 0.25 * stop
    pressure -= cav * rng.uniform(0.5, 1.1, size=n)
    pressure *= 1.0 - 0.15 * sag  # a sag that current does not explain

    # Bearing temperature: ambient swing + weather drift + lagged load heating (+ wear friction).
    ambient = 12.0 + 4.5 * np.sin(2 * np.pi * (hour - 9.0) / 24.0)
    ambient += 1.0 * _smooth_noise(rng, n, 12 * 3600.0, period_s)
    heat = 22.0 * speed**2 + 10.0 * wear * running
    temp = ambient + _first_order(heat, 35 * 60.0, period_s)

    # Vibration velocity RMS: rises with speed, resonance pass on start, wear and cavitation.
    vib = 0.12 + 2.3 * speed**2 + 0.9 * start + 2.8 * wear * speed**2
    vib += cav * (1.2 + 1.8 * np.abs(rng.standard_normal(n)))

    # Sensor noise and small random drifts (bounded, slowly varying).
    vib = vib * (1 + 0.05 * rng.standard_normal(n) + 0.03 * _smooth_noise(rng, n, 86400.0, period_s))
    vib += 0.02 * rng.standard_normal(n) + 0.15 * wear * rng.standard_normal(n) * running
    temp += 0.08 * rng.standard_normal(n) + 0.2 * _smooth_noise(rng, n, 2 * 86400.0, period_s)
    pressure += 0.02 * rng.standard_normal(n) + 0.02 * _smooth_noise(rng, n, 86400.0, period_s)
    current += 0.2 * rng.standard_normal(n) + 0.15 * _smooth_noise(rng, n, 86400.0, period_s)

    vib = np.maximum(vib, 0.02)
    current = np.maximum(current, 0.0)
    # Stuck transmitter: the last good reading repeats.
    idx = np.flatnonzero(stuck)
    if idx.size:
        for _, a, b, _ in (i for i in incidents if i[0] == "stuck_sensor"):
            pressure[a : b + 1] = pressure[a]

    frame = pd.DataFrame(
        {
            "time": START + pd.to_timedelta(t_s, unit="s"),
            "vibration_mm_s": np.round(vib, 3),
            "bearing_temp_c": np.round(temp, 2),
            "discharge_bar": np.round(pressure, 3),
            "motor_current_a": np.round(current, 2),
        }
    )
    return frame, incidents, test_idx


def _with_glitches(frame: pd.DataFrame, incidents, test_idx: int, spm: float, rng) -> pd.DataFrame:
    """Gaps, duplicates, out-of-order rows and a dead transmitter, placed away from the
    incidents."""
    n = len(frame)
    m = lambda minutes: max(1, int(round(minutes * spm)))  # noqa: E731
    mid = [(incidents[k][2] + incidents[k + 1][1]) // 2 for k in range(len(incidents) - 1)]
    quiet = max(range(len(incidents) - 1), key=lambda k: incidents[k + 1][1] - incidents[k][2])
    dead = incidents[quiet][2] + m(120)
    frame = frame.copy()
    frame.loc[dead:dead + m(120) - 1, DEAD_TRANSMITTER] = np.nan

    short_gap = range(int(0.23 * n), int(0.23 * n) + m(3))
    long_gap = range(test_idx + m(30), test_idx + m(30) + m(40))  # comms outage
    dropped = set(short_gap) | set(long_gap)

    # A second poll logged under the same timestamp, with slightly different values.
    j = mid[1]
    second = frame.iloc[[j]].copy()
    for col in CHANNELS:
        second[col] = np.round(second[col] * (1 + 0.01 * rng.standard_normal()), 3)
    full = pd.concat([frame, second], ignore_index=True)  # row n is the second poll

    order: List[int] = []
    exact_dup = int(0.31 * n)
    for i in range(n):
        if i in dropped:
            continue
        order.append(i)
        if i == exact_dup:
            order.append(i)  # exact re-send
        if i == j:
            order.append(n)

    def swap_after(i: int) -> None:  # rows i and i+1 arrive swapped
        p = order.index(i)
        order[p], order[p + 1] = order[p + 1], order[p]

    swap_after(int(0.12 * n))
    swap_after(mid[2])
    late = int(0.41 * n)  # one record arrives three rows late
    p = order.index(late)
    order.insert(p + 3, order.pop(p))

    return full.iloc[order].reset_index(drop=True)


def generate(out_dir, days: float = 7.0, period_s: int = 60, seed: int = 7) -> dict:
    """Write out_dir/station.csv and out_dir/incidents.csv; deterministic under `seed`.

    Returns {"data", "incidents": paths as str, "rows": rows written, "train_end": last
    timestamp of the normal span (inclusive), "test_start": first timestamp of the test span}.
    """
    if days < 4:
        raise ValueError(f"days={days}: the demo needs at least 4 days to place every incident")
    if period_s <= 0 or 3600 % period_s:
        raise ValueError(f"period_s={period_s}: use a positive divisor of 3600 (e.g. 10, 60)")
    rng = np.random.default_rng(seed)
    n = int(round(days * 86400 / period_s))
    frame, incidents, test_idx = _simulate(n, period_s, rng)
    data = _with_glitches(frame, incidents, test_idx, 60.0 / period_s, rng)

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    data_path, inc_path = out / "station.csv", out / "incidents.csv"
    data.assign(time=data["time"].dt.strftime(TIME_FORMAT)).to_csv(data_path, index=False)
    grid = frame["time"]
    inc = pd.DataFrame(
        {
            "start": [_fmt(grid[a]) for _, a, _, _ in incidents],
            "end": [_fmt(grid[b]) for _, _, b, _ in incidents],
            "kind": [k for k, _, _, _ in incidents],
        }
    )
    inc.to_csv(inc_path, index=False)
    return {
        "data": str(data_path),
        "incidents": str(inc_path),
        "rows": int(len(data)),
        "train_end": _fmt(grid[test_idx - 1]),
        "test_start": _fmt(grid[test_idx]),
    }


_SHADE = {
    "bearing_wear": "tab:orange",
    "cavitation": "tab:red",
    "stuck_sensor": "tab:purple",
    "pressure_sag": "tab:green",
}
_LABELS = {
    "vibration_mm_s": "vibration\n[mm/s RMS]",
    "bearing_temp_c": "bearing temp\n[°C]",
    "discharge_bar": "discharge\n[bar]",
    "motor_current_a": "motor current\n[A]",
}


def plot(data_path, incidents_path, png_path, channels: Sequence[str] = CHANNELS) -> str:
    """Draw the four channels with incidents shaded and the train/test split marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import Patch

    df = pd.read_csv(data_path, parse_dates=["time"])
    df = df.sort_values("time").drop_duplicates("time", keep="last").set_index("time")
    period = df.index.to_series().diff().median()
    df = df.reindex(pd.date_range(df.index[0], df.index[-1], freq=period))  # gaps -> line breaks
    inc = pd.read_csv(incidents_path, parse_dates=["start", "end"])
    split = df.index[int(np.floor(TRAIN_FRACTION * len(df)))]

    fig, axes = plt.subplots(len(channels), 1, figsize=(15, 2.3 * len(channels) + 1), sharex=True)
    for ax, col in zip(np.atleast_1d(axes), channels):
        ax.plot(df.index, df[col], lw=0.5, color="tab:blue")
        for row in inc.itertuples():
            ax.axvspan(row.start, row.end, color=_SHADE.get(row.kind, "grey"), alpha=0.3, lw=0)
        ax.axvline(split, color="black", ls="--", lw=1)
        ax.set_ylabel(_LABELS.get(col, col))
        ax.grid(alpha=0.3)
    first = np.atleast_1d(axes)[0]
    first.text(split, 1.02, " test span (faults) ->", transform=first.get_xaxis_transform(), fontsize=9)
    first.text(split, 1.02, "<- normal span (training) ", ha="right",
               transform=first.get_xaxis_transform(), fontsize=9)
    handles = [Patch(color=c, alpha=0.4, label=k.replace("_", " ")) for k, c in _SHADE.items()]
    fig.legend(handles=handles, loc="upper right", ncol=4, frameon=False)
    fig.suptitle("Hollowmere booster station, pump P2 (invented demo data)", x=0.01, ha="left")
    fig.tight_layout(rect=(0, 0, 1, 0.96))
    fig.savefig(png_path, dpi=110)
    plt.close(fig)
    return str(png_path)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Write the invented Hollowmere pump P2 demo data.")
    ap.add_argument("--out", required=True, help="output folder")
    ap.add_argument("--days", type=float, default=7.0, help="span in days (>= 4; default 7)")
    ap.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    ap.add_argument("--plot", action="store_true", help="also write station.png")
    args = ap.parse_args(argv)
    info = generate(args.out, days=args.days, seed=args.seed)
    print(f"wrote {info['data']} ({info['rows']} rows) and {info['incidents']}")
    print(f"normal span ends {info['train_end']}; test span starts {info['test_start']}")
    if args.plot:
        print("wrote", plot(info["data"], info["incidents"], Path(args.out) / "station.png"))
    print("All values are invented (no real machine, no real measurements).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
