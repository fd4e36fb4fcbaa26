"""The bundle manifest: the one definition of what a bundle is, its builder, writer and reader.

A bundle is a folder:

    manifest.json  [manifest.hmac]  [manifest.ed25519]  model.onnx  weights.npz  run.py
    INSTALL.txt  ganlet-NAME.service  ganlet/runtime/*.py  (a copy of this package, so the
    gateway needs no pip install)

manifest.json lists every other file with its SHA-256. The reader (load_bundle) is the
authority: compile/ and the tests build manifests through build_manifest and write them through
write_manifest, so both halves agree by construction. The manifest carries nothing of the
workstation (no paths, no teacher); the workstation keeps its own record beside the teacher.

What the checks prove (the security model; README "Gateway safety" says the same):
  - Unsigned: the SHA-256 list catches corruption (a bad copy, a flipped bit, a truncated
    file). It does NOT catch a deliberate edit: whoever changes a file can re-hash it.
  - Signed (manifest.hmac: HMAC-SHA256 under a shared secret; manifest.ed25519: Ed25519, checked
    with the public key alone): an edit of any listed file or of the manifest is refused, as is
    a bundle whose declared signature ("signing") was removed, when the gateway is told to check
    (--key / --public-key, --require-signature: the shipped unit does). The signatures sit
    beside the manifest because a manifest cannot hold its own signature.
  - Before any bundle code runs (trust.py, copied into run.py): paths confined to the folder,
    no links, no bytecode, no unlisted code, every code file's SHA-256 checked.
  - run.py is the checker: it vouches for everything else but not for itself. Keep bundles
    where only root can write (the unit's ProtectSystem=strict), or check them with a run.py
    installed once outside the bundle (--bundle DIR).
  - A bundle older than the newest one a state directory has seen is refused (rollback.py).
"""

import hashlib
import json
import sys
from datetime import datetime, timezone
from pathlib import Path
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np

from .alerts import AlertMachine
from .cusum import Cusum
from .drift import DriftMonitor
from .features import FEATURE_KINDS, rate_mask
from .held import HeldReadings
from .intake import DATE_ORDERS, DECIMALS
from .lstm import contract_shapes
from .score import ScoreRule
from .thresholds import make_threshold
from .trust import (  # noqa: F401  (re-exported: the bundle contract's names live here)
    ED25519_NAME,
    HMAC_NAME,
    MANIFEST_NAME,
    MIN_KEY_BYTES,
    SIGNATURE_FILES,
    BundleError,
    check_hashes,
    declared_signatures,
    ed25519_sign,
    file_sha256,
    read_key,
    read_manifest,
    safe_relative,
    sign_bytes,
    verify_trust,
)

# 2: manifest.hmac, no workstation section, requires; 2.1: optional "signing" (the signatures
# the packer wrote), manifest.ed25519
SCHEMA_VERSION = "2.1"
WEIGHTS_NAME = "weights.npz"
ONNX_NAME = "model.onnx"
QUANTISATION = "int8-symmetric-per-row"
# model.onnx's interface: compile/export.py builds to it, scorer.py runs it.
ONNX_OPSET = 20
ONNX_INPUT = "window"  # [N, L, C] float32, scaled
ONNX_RECONSTRUCTION = "reconstruction"  # [N, L, C]
ONNX_RESIDUALS = "residuals"  # [N, C]
# The oldest gateway this runtime is written for (Python 3.9 syntax, numpy 1.19 API); board
# profiles promising less are refused at compile time.
REQUIRES = {"python": "3.9", "numpy": "1.19"}
# Device vs workstation on the same int8 weights may differ by float rounding only; the teacher
# and the fp32 student are other networks, judged by rank agreement.
PARITY_TOLERANCES = {"score_rel": 1e-4, "spearman_min": 0.999, "sample_agreement_min": 0.995,
                     "event_match_hops": 3, "teacher_spearman_min": 0.95}

# key -> accepted python types (bool is excluded from numbers explicitly below)
_REQUIRED = {
    "schema_version": (str,),
    "tool_version": (str,),
    "created": (str,),
    "name": (str,),
    "time_column": (str,),
    "channels": (list,),
    "period_s": (int, float),
    "max_gap_periods": (int,),
    "scaler": (dict,),
    "window": (int,),
    "hop": (int,),
    "network": (dict,),
    "score": (dict,),
    "threshold": (dict,),
    "alerting": (dict,),
    "board": (dict,),
    "parity": (dict,),
    "requires": (dict,),
    "files": (dict,),
}
_NETWORK_KEYS = {
    "encoder": (list,),
    "latent": (int,),
    "generator": (list,),
    "weights": (str,),
    "onnx": (str,),
    "quantisation": (str,),
    "onnx_opset": (int,),
}


def _bundle_files(bundle_dir: Path) -> List[str]:
    """Every file under bundle_dir as a posix relative path, minus the manifest, its
    signatures and bytecode caches."""
    out = []
    for p in sorted(bundle_dir.rglob("*")):
        rel = p.relative_to(bundle_dir)
        if not p.is_file() or "__pycache__" in rel.parts:
            continue
        relposix = rel.as_posix()
        if relposix in (MANIFEST_NAME,) + tuple(SIGNATURE_FILES.values()):
            continue
        out.append(relposix)
    return out


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _check_type(where: str, value, types) -> None:
    if isinstance(value, bool) and bool not in types:
        ok = False
    else:
        ok = isinstance(value, types)
    if not ok:
        names = " or ".join(t.__name__ for t in types)
        raise BundleError(
            f"manifest: {where} must be {names}, got {type(value).__name__}; "
            "re-pack the bundle with the workstation tool"
        )


def _schema_major(version: str) -> int:
    try:
        return int(str(version).split(".")[0])
    except ValueError:
        raise BundleError(
            f"manifest: schema_version {version!r} is not of the form MAJOR.MINOR; "
            "re-pack the bundle"
        ) from None


def validate_manifest(manifest: dict) -> None:
    """Check required keys, types and values. Raises BundleError naming the first problem."""
    if not isinstance(manifest, dict):
        raise BundleError("manifest: top level must be a JSON object; re-pack the bundle")
    missing = [k for k in _REQUIRED if k not in manifest]
    if missing:
        raise BundleError(
            f"manifest: missing required key(s) {', '.join(missing)}; "
            "re-pack the bundle with a matching workstation tool"
        )
    for key, types in _REQUIRED.items():
        _check_type(key, manifest[key], types)
    _check_schema(manifest["schema_version"])
    try:
        datetime.fromisoformat(manifest["created"].replace("Z", "+00:00"))
    except ValueError:
        raise BundleError(
            f"manifest: created {manifest['created']!r} is not an ISO 8601 time"
        ) from None
    _check_channels(manifest)
    _check_scaler(manifest)
    _check_network(manifest["network"])
    _check_sections(manifest)
    _check_dialect(manifest)
    for rel, digest in manifest["files"].items():
        if not safe_relative(rel) or not isinstance(digest, str) or len(digest) != 64:
            raise BundleError(f"manifest: files entry {rel!r} is not a safe relative path + sha256")
    declared_signatures(manifest)


def trained_dialect(manifest: dict) -> Dict[str, Optional[str]]:
    """How the training data's cells were written: the gateway's defaults for reading the same
    export (`run.py stream` options override each), and how `ganlet evaluate` and `verify` read
    a data file against the bundle. Bundles from before decimal_mark and date_order: "." and
    none (numeric dates with the year last are then refused until an order is given)."""
    return {"tz": manifest.get("time_zone"), "decimal": manifest.get("decimal_mark", "."),
            "date_order": manifest.get("date_order")}


def times_from_rows(manifest: dict) -> bool:
    """Whether the training file had no time column, its rows taken as one sample each,
    period_s apart from 1970-01-01T00:00:00Z (`ganlet train --period`). `ganlet evaluate` and
    `verify` then read a data file without one the same way; the gateway still reads every live
    row's time from time_column."""
    return manifest.get("times_from_rows", False)


def _check_dialect(manifest: dict) -> None:
    if not isinstance(manifest.get("times_from_rows", False), bool):
        raise BundleError("manifest: times_from_rows must be true or false")
    if manifest.get("decimal_mark", ".") not in DECIMALS:
        raise BundleError(f"manifest: decimal_mark must be one of {' '.join(DECIMALS)}")
    if manifest.get("date_order") not in (None,) + tuple(DATE_ORDERS):
        raise BundleError(f"manifest: date_order must be null or one of "
                          f"{', '.join(DATE_ORDERS)}")


def _check_schema(version: str) -> None:
    major, ours = _schema_major(version), _schema_major(SCHEMA_VERSION)
    if major > ours:
        raise BundleError(
            f"manifest: bundle schema {version} is newer than this runtime understands "
            f"({SCHEMA_VERSION}); update the gateway runtime (use the run.py that ships inside "
            "the bundle) or re-pack with an older tool"
        )
    if major < ours:
        raise BundleError(
            f"manifest: bundle schema {version} is older than this runtime supports "
            f"({SCHEMA_VERSION}); re-pack the bundle"
        )


def _check_channels(manifest: dict) -> None:
    channels = manifest["channels"]
    if not channels:
        raise BundleError("manifest: channels is empty; the model needs at least one input")
    names = []
    for i, ch in enumerate(channels):
        _check_type(f"channels[{i}]", ch, (dict,))
        for k in ("name", "unit"):
            if k not in ch:
                raise BundleError(f"manifest: channels[{i}] lacks {k!r}")
            _check_type(f"channels[{i}].{k}", ch[k], (str,))
        names.append(ch["name"])
    if len(set(names)) != len(names):
        raise BundleError(f"manifest: channel names are not unique: {names}")
    if manifest["time_column"] in names:
        raise BundleError("manifest: time_column is also listed as a channel")
    if not (_is_number(manifest["period_s"]) and manifest["period_s"] > 0):
        raise BundleError("manifest: period_s must be a positive number of seconds")
    if manifest["max_gap_periods"] < 0:
        raise BundleError("manifest: max_gap_periods must be >= 0")
    if manifest["window"] < 1 or manifest["hop"] < 1:
        raise BundleError("manifest: window and hop must be >= 1")


def _check_scaler(manifest: dict) -> None:
    scaler, n = manifest["scaler"], len(manifest["channels"])
    if scaler.get("kind") != "robust":
        raise BundleError(f"manifest: scaler.kind {scaler.get('kind')!r} unknown (expected 'robust')")
    for k in ("center", "scale"):
        vals = scaler.get(k)
        if not isinstance(vals, list) or len(vals) != n or not all(_is_number(v) for v in vals):
            raise BundleError(
                f"manifest: scaler.{k} must be a list of {n} numbers (one per channel)"
            )
    if any(not (v > 0) for v in scaler["scale"]):
        raise BundleError("manifest: scaler.scale must be strictly positive")
    features = scaler.get("features")
    if not isinstance(features, list) or len(features) != n or not all(
        f in FEATURE_KINDS for f in features
    ):
        raise BundleError(
            f"manifest: scaler.features must list {n} of {', '.join(FEATURE_KINDS)} "
            "(one per channel)"
        )


def _check_network(net: dict) -> None:
    for key, types in _NETWORK_KEYS.items():
        if key not in net:
            raise BundleError(f"manifest: network lacks {key!r}")
        _check_type(f"network.{key}", net[key], types)
    for part in ("encoder", "generator"):
        if not net[part] or not all(isinstance(h, int) and h > 0 for h in net[part]):
            raise BundleError(f"manifest: network.{part} must be a non-empty list of sizes")
    for part in ("weights", "onnx"):
        if not safe_relative(net[part]):
            raise BundleError(f"manifest: network.{part} {net[part]!r} leaves the bundle folder "
                              "(absolute, '..' or malformed); do not run this bundle")


def _check_sections(manifest: dict) -> None:
    """score, threshold and alerting are checked by building them, as the gateway will."""
    builders = [("score", ScoreRule),
                ("threshold", lambda d: (make_threshold(d), Cusum.from_policy(d),
                                         HeldReadings.from_policy(d, len(manifest["channels"])))),
                ("alerting", lambda d: AlertMachine(**d))]
    if "drift" in manifest:
        builders.append(("drift", lambda d: DriftMonitor(d, [c["name"] for c in
                                                             manifest["channels"]], 1, 1)))
    for section, build in builders:
        try:
            build(manifest[section])
        except (TypeError, ValueError, KeyError) as exc:
            raise BundleError(f"manifest: {section}: {exc}; re-pack the bundle") from None
    regimes = manifest["score"].get("regimes")
    if regimes is not None and len(regimes["centres"][0]) != len(manifest["channels"]):
        raise BundleError("manifest: score.regimes must give one value per channel")
    board = manifest["board"]
    if not isinstance(board.get("name"), str):
        raise BundleError("manifest: board.name must be a string")
    for k in ("budget", "estimate"):
        if not isinstance(board.get(k), dict):
            raise BundleError(f"manifest: board.{k} must be an object")
    if not isinstance(manifest.get("fidelity", {}), dict):
        raise BundleError("manifest: fidelity must be an object")
    for k in REQUIRES:
        if version_tuple(manifest["requires"].get(k)) is None:
            raise BundleError(f"manifest: requires.{k} must be a version 'MAJOR.MINOR'")


def version_tuple(text) -> Optional[Tuple[int, int]]:
    """'3.9' or '1.19.5' -> (3, 9) / (1, 19); None when it is not a version."""
    try:
        major, minor = str(text).split(".")[:2]
        return int(major), int(minor)
    except ValueError:
        return None


def unmet_requirements(manifest: dict) -> List[str]:
    """What this interpreter lacks of the bundle's `requires` (empty when it can run it)."""
    here = {"python": "{}.{}".format(*sys.version_info[:2]), "numpy": np.__version__}
    return [f"{k} {here[k]} is older than the bundle needs ({v})"
            for k, v in manifest["requires"].items()
            if k in here and version_tuple(here[k]) < version_tuple(v)]


def network_section(network: dict) -> dict:
    """The manifest's network: the caller's sizes, the contract's file names and formats."""
    return {"encoder": [int(h) for h in network["encoder"]], "latent": int(network["latent"]),
            "generator": [int(h) for h in network["generator"]], "weights": WEIGHTS_NAME,
            "onnx": ONNX_NAME, "quantisation": QUANTISATION, "onnx_opset": ONNX_OPSET}


def build_manifest(
    *,
    name: str,
    time_column: str,
    channels: Sequence[Tuple[str, str]],
    period_s: float,
    max_gap_periods: int,
    scaler: dict,
    window: int,
    hop: int,
    network: dict,
    score: dict,
    threshold: dict,
    alerting: dict,
    board: dict,
    tool_version: str,
    parity_tolerances: Optional[dict] = None,
    created: Optional[str] = None,
    drift: Optional[dict] = None,
    false_alarms: Optional[dict] = None,
    time_zone: str = "UTC",
    fidelity: Optional[dict] = None,
    decimal_mark: str = ".",
    date_order: Optional[str] = None,
    times_from_rows: bool = False,
) -> dict:
    """Every manifest is made here: the caller gives what varies, this fills the contract's
    constants. network = {"encoder": [...], "latent": K, "generator": [...]}; channels = (name, unit);
    threshold: a policy (thresholds.make_threshold), optionally with "cusum" (cusum.Cusum; an
    older runtime refuses such a manifest); drift: drift.drift_section(...) (optional);
    false_alarms: the budget and the rate it implies (optional, informative); time_zone,
    decimal_mark, date_order, times_from_rows: how the training data was written
    (trained_dialect, times_from_rows); fidelity (optional): how the bundle's network compares
    with its teacher (compile/fidelity.py), for people only."""
    optional = {k: v for k, v in (("drift", drift), ("false_alarms", false_alarms),
                                  ("fidelity", fidelity), ("times_from_rows", times_from_rows))
                if v not in (None, False)}
    return {**optional,
        "schema_version": SCHEMA_VERSION,
        "tool_version": tool_version,
        "created": created or datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "name": name,
        "time_column": time_column,
        "time_zone": str(time_zone),
        "decimal_mark": str(decimal_mark),
        "date_order": date_order,
        "channels": [{"name": n, "unit": u} for n, u in channels],
        "period_s": float(period_s),
        "max_gap_periods": int(max_gap_periods),
        "scaler": dict(scaler),
        "window": int(window),
        "hop": int(hop),
        "network": network_section(network),
        "score": dict(score),
        "threshold": dict(threshold),
        "alerting": dict(alerting),
        "board": dict(board),
        "parity": {"tolerances": {**PARITY_TOLERANCES, **(parity_tolerances or {})}},
        "requires": dict(REQUIRES),
    }


def write_manifest(bundle_dir, manifest: dict, sign_key: Optional[bytes] = None,
                   ed25519_key: Optional[bytes] = None) -> Path:
    """Fill manifest['files'] from the folder, validate, write manifest.json and the signatures
    asked for: sign_key (HMAC secret) -> manifest.hmac, ed25519_key (PEM private key) ->
    manifest.ed25519. The manifest's "signing" lists them, so their loss is noticed."""
    bundle_dir = Path(bundle_dir)
    manifest["files"] = {rel: file_sha256(bundle_dir / rel) for rel in _bundle_files(bundle_dir)}
    keys = {"hmac-sha256": sign_key, "ed25519": ed25519_key}
    signing = [kind for kind in SIGNATURE_FILES if keys[kind] is not None]
    manifest.pop("signing", None)
    if signing:
        manifest["signing"] = signing
    validate_manifest(manifest)
    path = bundle_dir / MANIFEST_NAME
    data = (json.dumps(manifest, sort_keys=True, indent=2) + "\n").encode("utf-8")
    path.write_bytes(data)
    for kind, name in SIGNATURE_FILES.items():
        sig_path = bundle_dir / name
        if keys[kind] is None:
            if sig_path.exists():
                sig_path.unlink()  # a stale signature would no longer match
            continue
        signature = sign_bytes(keys[kind], data) if kind == "hmac-sha256" else ed25519_sign(
            keys[kind], data)
        sig_path.write_text(signature + "\n")
    return path


class Bundle:
    """A verified bundle: manifest fields as attributes, weights as float32 arrays."""

    def __init__(self, bundle_dir: Path, manifest: dict, manifest_bytes: bytes,
                 signatures: Dict[str, str]):
        self.dir = Path(bundle_dir)
        self.manifest = manifest
        self.bundle_id = hashlib.sha256(manifest_bytes).hexdigest()
        self.signatures = dict(signatures)  # kind -> "verified" | "not checked"
        self.signed = "verified" in self.signatures.values()  # only ever after verifying
        self.channels = [c["name"] for c in manifest["channels"]]
        self.units = [c["unit"] for c in manifest["channels"]]
        self.time_column = manifest["time_column"]
        self.period_s = float(manifest["period_s"])
        self.max_gap_periods = int(manifest["max_gap_periods"])
        self.window = int(manifest["window"])
        self.hop = int(manifest["hop"])
        self.center = np.asarray(manifest["scaler"]["center"], dtype=np.float32)
        self.scale = np.asarray(manifest["scaler"]["scale"], dtype=np.float32)
        self.features = list(manifest["scaler"]["features"])
        self.rate = rate_mask(self.features)  # per sample on the gateway: computed once here
        self.threshold_policy = dict(manifest["threshold"])
        self.alerting = dict(manifest["alerting"])
        self.weights_path = self.dir / manifest["network"]["weights"]
        self.onnx_path = self.dir / manifest["network"]["onnx"]
        self._weights = None  # type: Optional[Dict[str, np.ndarray]]

    @classmethod
    def in_memory(cls, manifest: dict, weights: Dict[str, np.ndarray]) -> "Bundle":
        """A bundle that exists only as a manifest and weights (the workstation replays its
        calibration span through the gateway's detector before the folder is written)."""
        raw = json.dumps(manifest, sort_keys=True).encode("utf-8")
        bundle = cls(Path("."), manifest, raw, signatures={})
        bundle._weights = {k: np.asarray(v, dtype=np.float32) for k, v in weights.items()}
        return bundle

    def scaled(self, feats: np.ndarray) -> np.ndarray:
        """Features (one row or [T, C]) -> the float32 values the ring holds."""
        return ((feats - self.center) / self.scale).astype(np.float32)

    @property
    def weights(self) -> Dict[str, np.ndarray]:
        if self._weights is None:
            from .weights import load_weights

            self._weights = {
                k: np.asarray(v, dtype=np.float32) for k, v in load_weights(self.weights_path).items()
            }
        return self._weights

    def summary(self) -> dict:
        m = self.manifest
        return {
            "name": m["name"],
            "bundle_id": self.bundle_id,
            "schema_version": m["schema_version"],
            "tool_version": m["tool_version"],
            "created": m["created"],
            "signed": self.signed,
            "signatures": dict(self.signatures),
            "channels": [{"name": n, "unit": u, "feature": f}
                         for n, u, f in zip(self.channels, self.units, self.features)],
            "time_column": self.time_column,
            "input": trained_dialect(m),
            "period_s": self.period_s,
            "window": self.window,
            "hop": self.hop,
            "threshold": self.threshold_policy.get("kind"),
            "cusum": self.threshold_policy.get("cusum"),
            "held": self.threshold_policy.get("held"),
            "false_alarms": m.get("false_alarms"),
            "alerting": dict(self.alerting),
            "drift": (m["drift"].get("action", "report") if m.get("drift") is not None
                      else None),
            "alert_steps": bool((m.get("drift") or {}).get("alert_steps", False)),
            "board": m["board"].get("name"),
            "files": len(m["files"]),
        }


def check_weight_shapes(manifest: dict, weights: Dict[str, np.ndarray]) -> None:
    """The weights must be the network the manifest describes (lstm.contract_shapes)."""
    net = manifest["network"]
    expected = contract_shapes(len(manifest["channels"]), net["encoder"], net["latent"],
                               net["generator"])
    missing = sorted(set(expected) - set(weights))
    if missing:
        raise BundleError(
            f"weights: missing array(s) {', '.join(missing)} for the network described in the "
            "manifest; re-pack the bundle"
        )
    for key, shape in expected.items():
        got = tuple(np.shape(weights[key]))
        if got != shape:
            raise BundleError(
                f"weights: {key} has shape {got}, the manifest implies {shape} "
                f"({len(manifest['channels'])} channels); re-pack the bundle"
            )
    extra = sorted(set(weights) - set(expected))
    if extra:
        raise BundleError(f"weights: unexpected array(s) {', '.join(extra)}; re-pack the bundle")


def load_bundle(
    bundle_dir,
    key: Optional[bytes] = None,
    require_signature: bool = False,
    check_files: bool = True,
    public_key: Optional[bytes] = None,
    skip_signature: bool = False,
) -> Bundle:
    """Read, verify and return a bundle. Raises BundleError saying what is wrong.
    key: HMAC secret; public_key: PEM Ed25519 public key; skip_signature: run a signed bundle
    without checking its signature (workstation tools; the SHA-256 list is still checked)."""
    bundle_dir = Path(bundle_dir)
    raw, manifest = read_manifest(bundle_dir)
    # Refuse a newer major schema before anything else: its keys may mean other things.
    if "schema_version" in manifest:
        major = _schema_major(manifest["schema_version"])
        if major > _schema_major(SCHEMA_VERSION):
            raise BundleError(
                f"manifest: bundle schema {manifest['schema_version']} is newer than this "
                f"runtime understands ({SCHEMA_VERSION}); run the bundle's own run.py or update "
                "the gateway runtime"
            )
    keys = {"hmac-sha256": key, "ed25519": public_key}
    signatures = verify_trust(bundle_dir, raw, manifest, keys, require_signature, skip_signature,
                              check_code=check_files)
    validate_manifest(manifest)
    if check_files:
        check_hashes(bundle_dir, manifest["files"])
    unmet = unmet_requirements(manifest)
    if unmet:
        raise BundleError(f"this gateway cannot run the bundle: {'; '.join(unmet)}; upgrade it "
                          "or compile for a board profile that matches it")
    bundle = Bundle(bundle_dir, manifest, raw, signatures)
    _check_data_files(bundle)
    check_weight_shapes(manifest, bundle.weights)
    return bundle


def _check_data_files(bundle: Bundle) -> None:
    """The network files the scorers open must be files the manifest lists (and so hashed)."""
    net, listed = bundle.manifest["network"], bundle.manifest["files"]
    if not bundle.weights_path.is_file():
        raise BundleError(f"{bundle.weights_path}: weights file missing; copy the bundle again")
    if net["weights"] not in listed:
        raise BundleError(f"manifest: network.weights {net['weights']!r} is not a listed file; "
                          "re-pack the bundle")
    if bundle.onnx_path.exists() and net["onnx"] not in listed:
        raise BundleError(f"manifest: network.onnx {net['onnx']!r} is not a listed file; "
                          "re-pack the bundle")
