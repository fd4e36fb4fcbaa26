"""Build a tiny real bundle without torch: random small weights in the network contract,
quantised with compile/quantise.py, exported with compile/export.py (when onnx is installed),
the runtime package copied in, manifest written through runtime/manifest.py.

Also: a clean sensor CSV generator with optional injected anomalies, and helpers that score
windows directly with runtime.lstm.Network (the test-side computation the stream must match).
"""

import shutil
from pathlib import Path
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np

from ganlet.runtime.entry import RUN_PY
from ganlet.runtime.intake import format_time
from ganlet.runtime.lstm import Network
from ganlet.runtime.manifest import build_manifest, write_manifest
from ganlet.runtime.score import ScoreRule, score_section
from ganlet.runtime.weights import load_weights

RUNTIME_DIR = Path(__file__).resolve().parent.parent / "runtime"
CHANNELS = [("flow", "m3/h"), ("pressure", "bar"), ("vibration", "mm/s")]
CENTER = [40.0, 3.0, 1.5]
SCALE = [5.0, 0.4, 0.3]
T0 = 1_700_000_000.0  # 2023-11-14T22:13:20Z



def make_weights(n_channels: int, encoder: Sequence[int] = (8,), latent: int = 3,
                 generator: Sequence[int] = (8,), seed: int = 0) -> Dict[str, np.ndarray]:
    """Random float32 weights in ONNX LSTM layout (DEVELOPERS.md), Glorot-like scale."""
    rng = np.random.default_rng(seed)
    out = {}
    for net, sizes, n_in, n_out in (("enc", encoder, n_channels, latent),
                                    ("gen", generator, latent, n_channels)):
        prev = n_in
        for k, h in enumerate(sizes):
            s = 1.0 / np.sqrt(prev + h)
            out[f"{net}.lstm{k}.W"] = rng.uniform(-2 * s, 2 * s, (1, 4 * h, prev)).astype(np.float32)
            out[f"{net}.lstm{k}.R"] = rng.uniform(-2 * s, 2 * s, (1, 4 * h, h)).astype(np.float32)
            out[f"{net}.lstm{k}.B"] = rng.uniform(-0.1, 0.1, (1, 8 * h)).astype(np.float32)
            prev = h
        s = 1.0 / np.sqrt(prev)
        out[f"{net}.head.W"] = rng.uniform(-s, s, (n_out, prev)).astype(np.float32)
        out[f"{net}.head.b"] = rng.uniform(-0.1, 0.1, (n_out,)).astype(np.float32)
    return out


def raw_values(n: int, seed: int = 1,
               anomalies: Sequence[Tuple[int, int, int, float]] = ()) -> np.ndarray:
    """[n, C] raw sensor values: daily-ish sine + noise; anomalies = (start, length, channel,
    offset in scale units) added on top."""
    rng = np.random.default_rng(seed)
    i = np.arange(n)[:, None]
    phase = np.array([0.0, 1.0, 2.0])[None, :]
    z = 0.8 * np.sin(2 * np.pi * i / 50.0 + phase) + 0.1 * rng.standard_normal((n, 3))
    for start, length, ch, offset in anomalies:
        z[start:start + length, ch] += offset
    return np.asarray(CENTER) + np.asarray(SCALE) * z


def scaled(values: np.ndarray) -> np.ndarray:
    """The runtime's scaling, written out: (x - center) / scale, float32."""
    c = np.asarray(CENTER, dtype=np.float32).astype(np.float64)
    s = np.asarray(SCALE, dtype=np.float32).astype(np.float64)
    return ((np.asarray(values, dtype=np.float64) - c) / s).astype(np.float32)


def write_csv(path, values: np.ndarray, times: Optional[Sequence[float]] = None,
              iso: bool = True, order: Optional[List[str]] = None,
              extra: bool = False) -> List[str]:
    """A sensor CSV. Returns its lines (header first). order = column order of the channels."""
    names = [c for c, _ in CHANNELS]
    order = order or names
    times = [T0 + k for k in range(len(values))] if times is None else list(times)
    header = ["time"] + order + (["site"] if extra else [])
    lines = [",".join(header)]
    for t, row in zip(times, values):
        cells = [format_time(t) if iso else repr(float(t))]
        cells += [repr(float(row[names.index(c)])) for c in order]
        if extra:
            cells.append("north")
        lines.append(",".join(cells))
    Path(path).write_text("\n".join(lines) + "\n")
    return lines


def blank_out(path, rows: Sequence[int], channel: int, cell: str = "") -> None:
    """Rewrite a write_csv file with `channel` (index in CHANNELS order) written as `cell` on
    data rows `rows` (0 = the first data row): a transmitter that stopped sending."""
    lines = Path(path).read_text().splitlines()
    rows = set(rows)
    for k in range(1, len(lines)):
        if k - 1 in rows:
            cells = lines[k].split(",")
            cells[1 + channel] = cell
            lines[k] = ",".join(cells)
    Path(path).write_text("\n".join(lines) + "\n")


def windows_of(x: np.ndarray, window: int, hop: int) -> np.ndarray:
    """Every hop-th window of length `window` (stream order), [N, L, C]."""
    starts = range(0, len(x) - window + 1, hop)
    return np.stack([x[s:s + window] for s in starts]).astype(np.float32)


def direct_scores(bundle_dir, x_scaled: np.ndarray, window: int, hop: int,
                  score: Optional[dict] = None) -> np.ndarray:
    """Scores computed here, straight from Network.reconstruct on the bundle's own weights."""
    net = Network(load_weights(Path(bundle_dir) / "weights.npz"))
    w = windows_of(x_scaled, window, hop)
    return ScoreRule(score or score_section()).score(w, net.reconstruct(w))[0]


def build_bundle(
    bundle_dir,
    window: int = 16,
    hop: int = 4,
    threshold: Optional[dict] = None,
    alerting: Optional[dict] = None,
    onnx_model: bool = True,
    sign_key: Optional[bytes] = None,
    max_gap_periods: int = 3,
    period_s: float = 1.0,
    seed: int = 0,
    calibrate_on: Optional[np.ndarray] = None,
    features: Optional[List[str]] = None,
    center: Sequence[float] = CENTER,
    score: Optional[dict] = None,
    drift: Optional[dict] = None,
    created: str = "2023-11-14T00:00:00Z",
    ed25519_key: Optional[bytes] = None,
    time_zone: str = "UTC",
    dialect: Optional[dict] = None,
) -> Path:
    """A complete bundle folder. threshold=None -> static level from calibrate_on's scores.
    features=None watches every channel's level."""
    from ganlet.compile.quantise import quantise_weights  # numpy only

    bundle_dir = Path(bundle_dir)
    bundle_dir.mkdir(parents=True, exist_ok=True)
    weights = make_weights(len(CHANNELS), seed=seed)
    qweights = quantise_weights(weights)
    np.savez(bundle_dir / "weights.npz", **qweights)
    if onnx_model:
        from ganlet.compile.export import build_onnx, save_onnx

        save_onnx(build_onnx(qweights, len(CHANNELS), quantised=True), bundle_dir / "model.onnx")
    pkg = bundle_dir / "ganlet" / "runtime"
    pkg.mkdir(parents=True, exist_ok=True)
    (bundle_dir / "ganlet" / "__init__.py").write_text("")
    for src in sorted(RUNTIME_DIR.glob("*.py")):
        shutil.copy2(src, pkg / src.name)
    (bundle_dir / "run.py").write_text(RUN_PY)
    (bundle_dir / "INSTALL.txt").write_text("Copy this folder to the gateway; python3 run.py check\n")

    if threshold is None:
        base = calibrate_on if calibrate_on is not None else raw_values(600, seed=99)
        s = direct_scores(bundle_dir, scaled(base), window, hop, score)
        threshold = {"kind": "static", "level": float(np.quantile(s, 0.99) * 1.5)}
    manifest = build_manifest(
        name="fixture-pump", time_column="time", channels=CHANNELS, period_s=period_s,
        max_gap_periods=max_gap_periods,
        scaler={"kind": "robust", "center": list(center), "scale": list(SCALE),
                "features": list(features or ["level"] * len(CHANNELS))},
        window=window, hop=hop, network={"encoder": [8], "latent": 3, "generator": [8]},
        score=score or score_section(), threshold=threshold, drift=drift,
        alerting=alerting or {"warmup_hops": 2, "min_hops": 2, "close_ratio": 0.8,
                              "cooldown_hops": 2},
        board={"name": "test-board",  # key names as compile/pack.py writes them
               "budget": {"hop_ms": 50.0, "ram_mb": 256, "storage_kb": 150,
                          "onnxruntime": False},
               "estimate": {"hop_ms": 1.0, "ram_mb": 1.0, "flops_per_hop": 1}},
        # made before its feeds start (T0), as in the field: the gateway refuses rows older than
        # the bundle's creation minus a backlog allowance unless told the input is a replay
        tool_version="0.1.0-test", created=created, time_zone=time_zone,
        **(dialect or {}),
        parity_tolerances={"score_rel": 1e-5},
    )
    write_manifest(bundle_dir, manifest, sign_key=sign_key, ed25519_key=ed25519_key)
    return bundle_dir
