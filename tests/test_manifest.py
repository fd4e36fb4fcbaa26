"""Bundle manifest: write/load round trip and every refusal the gateway must make."""

import hashlib
import hmac
import json
import subprocess
import sys

import numpy as np
import pytest
import runtime_fixtures as fx

from ganlet.runtime.manifest import (
    SCHEMA_VERSION,
    BundleError,
    file_sha256,
    load_bundle,
    validate_manifest,
    write_manifest,
)

KEY = b"site-7-shared-secret"


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("tpl") / "bundle", onnx_model=False)


@pytest.fixture
def bundle_dir(template, tmp_path):
    import shutil

    dst = tmp_path / "bundle"
    shutil.copytree(template, dst)
    return dst


def _manifest(d):
    return json.loads((d / "manifest.json").read_text())


def test_round_trip(bundle_dir):
    b = load_bundle(bundle_dir)
    m = _manifest(bundle_dir)
    assert b.channels == [c for c, _ in fx.CHANNELS]
    assert b.units == [u for _, u in fx.CHANNELS]
    assert (b.window, b.hop, b.time_column) == (16, 4, "time")
    assert b.center.dtype == np.float32 and b.scale.dtype == np.float32
    np.testing.assert_array_equal(b.center, np.float32(fx.CENTER))
    # reference: hashlib.sha256 of the manifest bytes, computed independently here
    assert b.bundle_id == hashlib.sha256((bundle_dir / "manifest.json").read_bytes()).hexdigest()
    # every file under the folder is listed (and nothing else), with its sha256
    on_disk = sorted(
        p.relative_to(bundle_dir).as_posix() for p in bundle_dir.rglob("*")
        if p.is_file() and p.name not in ("manifest.json", "manifest.hmac")
        and "__pycache__" not in p.parts
    )
    assert sorted(m["files"]) == on_disk
    assert "ganlet/runtime/manifest.py" in m["files"]
    for rel, digest in m["files"].items():
        assert digest == hashlib.sha256((bundle_dir / rel).read_bytes()).hexdigest()
    # manifest.json is sort_keys + indent 2
    assert (bundle_dir / "manifest.json").read_text() == json.dumps(m, sort_keys=True, indent=2) + "\n"
    # weights come back dequantised float32 with the contract's shapes
    assert b.weights["enc.lstm0.W"].shape == (1, 32, 3)
    assert all(v.dtype == np.float32 for v in b.weights.values())
    assert b.signed is False


def test_tampered_file_refused_naming_it(bundle_dir):
    target = bundle_dir / "ganlet" / "runtime" / "ring.py"
    data = bytearray(target.read_bytes())
    data[10] ^= 0x01
    target.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"ganlet/runtime/ring\.py: SHA-256 does not match"):
        load_bundle(bundle_dir)
    # check_files=False skips the file check (for tools that only read the manifest)
    assert load_bundle(bundle_dir, check_files=False).window == 16


def test_missing_listed_file_refused(bundle_dir):
    (bundle_dir / "INSTALL.txt").unlink()
    with pytest.raises(BundleError, match=r"INSTALL\.txt: listed in the manifest but missing"):
        load_bundle(bundle_dir)


def test_unlisted_python_file_refused(bundle_dir):
    (bundle_dir / "ganlet" / "runtime" / "extra.py").write_text("print('hi')\n")
    with pytest.raises(BundleError, match=r"extra\.py: Python file not listed"):
        load_bundle(bundle_dir)


def test_signature_good_wrong_key_and_required(bundle_dir):
    m = _manifest(bundle_dir)
    write_manifest(bundle_dir, m, sign_key=KEY)
    sig = (bundle_dir / "manifest.hmac").read_text().strip()
    # reference: hmac.new(key, msg, sha256) from the standard library, computed here
    expected = hmac.new(KEY, (bundle_dir / "manifest.json").read_bytes(), hashlib.sha256).hexdigest()
    assert sig == expected
    assert load_bundle(bundle_dir, key=KEY, require_signature=True).signed is True
    with pytest.raises(BundleError, match="signature does not match"):
        load_bundle(bundle_dir, key=b"another-key")
    # a manifest edited after signing (e.g. a lowered threshold) is refused under the key
    m2 = _manifest(bundle_dir)
    m2["threshold"]["level"] = 1e-9
    (bundle_dir / "manifest.json").write_text(json.dumps(m2, sort_keys=True, indent=2) + "\n")
    with pytest.raises(BundleError, match="signature does not match"):
        load_bundle(bundle_dir, key=KEY)


def test_unsigned_with_require_signature_refused(bundle_dir):
    assert not (bundle_dir / "manifest.hmac").exists()
    with pytest.raises(BundleError, match="no manifest.hmac"):
        load_bundle(bundle_dir, key=KEY, require_signature=True)
    with pytest.raises(BundleError, match="no key was given"):
        load_bundle(bundle_dir, require_signature=True)


def test_newer_major_schema_refused_with_message(bundle_dir):
    m = _manifest(bundle_dir)
    major = int(SCHEMA_VERSION.split(".")[0])
    m["schema_version"] = f"{major + 1}.0"
    m["some_future_key"] = {"x": 1}
    (bundle_dir / "manifest.json").write_text(json.dumps(m, sort_keys=True, indent=2))
    with pytest.raises(BundleError, match=rf"schema {major + 1}\.0 is newer than this runtime"):
        load_bundle(bundle_dir)


def test_newer_minor_schema_accepted(bundle_dir):
    m = _manifest(bundle_dir)
    m["schema_version"] = SCHEMA_VERSION.split(".")[0] + ".7"
    write_manifest(bundle_dir, m)
    assert load_bundle(bundle_dir).manifest["schema_version"].endswith(".7")


@pytest.mark.parametrize("key", ["window", "channels", "scaler", "alerting", "files"])
def test_missing_key_named(bundle_dir, key):
    m = _manifest(bundle_dir)
    del m[key]
    with pytest.raises(BundleError, match=rf"missing required key\(s\) {key}"):
        validate_manifest(m)
    (bundle_dir / "manifest.json").write_text(json.dumps(m))
    with pytest.raises(BundleError, match=key):
        load_bundle(bundle_dir)


def test_type_and_value_errors_are_explained(bundle_dir):
    m = _manifest(bundle_dir)
    bad = dict(m, window="16")
    with pytest.raises(BundleError, match="window must be int"):
        validate_manifest(bad)
    bad = json.loads(json.dumps(m))
    bad["scaler"]["scale"] = [1.0, 0.0, 1.0]
    with pytest.raises(BundleError, match="strictly positive"):
        validate_manifest(bad)
    bad = json.loads(json.dumps(m))
    bad["files"] = {"../etc/passwd": "0" * 64}
    with pytest.raises(BundleError, match="safe relative path"):
        validate_manifest(bad)


def test_weight_shapes_checked_against_channels(bundle_dir):
    m = _manifest(bundle_dir)
    m["channels"].append({"name": "temperature", "unit": "degC"})
    m["scaler"]["center"].append(0.0)
    m["scaler"]["scale"].append(1.0)
    m["scaler"]["features"].append("level")
    write_manifest(bundle_dir, m)
    with pytest.raises(BundleError, match=r"enc\.lstm0\.W has shape \(1, 32, 3\).*\(1, 32, 4\)"):
        load_bundle(bundle_dir)


def test_file_sha256_matches_hashlib(tmp_path):
    p = tmp_path / "blob.bin"
    data = bytes(range(256)) * 1000
    p.write_bytes(data)
    # reference: hashlib.sha256 over the whole buffer at once
    assert file_sha256(p) == hashlib.sha256(data).hexdigest()


def test_check_command(bundle_dir, tmp_path):
    key_file = tmp_path / "key"
    key_file.write_bytes(KEY + b"\n")
    write_manifest(bundle_dir, _manifest(bundle_dir), sign_key=KEY)
    ok = subprocess.run([sys.executable, str(bundle_dir / "run.py"), "check", "--json",
                         "--key", str(key_file), "--require-signature"],
                        capture_output=True, text=True)
    assert ok.returncode == 0, ok.stderr
    summary = json.loads(ok.stdout)
    assert summary["verified"] is True and summary["signed"] is True
    (tmp_path / "bad").write_bytes(b"not-the-key-it-was-signed-with")
    bad = subprocess.run([sys.executable, str(bundle_dir / "run.py"), "check",
                          "--key", str(tmp_path / "bad")], capture_output=True, text=True)
    assert bad.returncode == 1 and "signature does not match" in bad.stderr
