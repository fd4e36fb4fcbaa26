"""A bundle's code runs only after it is verified, and a signed bundle only with its signature
verified: every way in the hardening review broke it (issue 12 items 4 and 5)."""

import importlib.util
import json
import os
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import runtime_fixtures as fx

from ganlet.compile.pack import HMAC_KEY_FILE, PUBLIC_KEY_FILE, VERIFIER, service_unit
from ganlet.runtime.manifest import BundleError, load_bundle, write_manifest

KEY = b"site-7-shared-secret-for-tests"
MARKER = "FOREIGN_CODE_RAN"
# A module body that leaves a trace when (and only when) it runs.
TRACE = f"open({MARKER!r}, 'w').write('ran')\n"
needs_crypto = pytest.mark.skipif(importlib.util.find_spec("cryptography") is None,
                                  reason="the cryptography package is not installed")


@pytest.fixture(scope="module")
def templates(tmp_path_factory):
    root = tmp_path_factory.mktemp("trust")
    return {"plain": fx.build_bundle(root / "plain", onnx_model=False),
            "hmac": fx.build_bundle(root / "hmac", onnx_model=False, sign_key=KEY)}


@pytest.fixture
def copy_of(templates, tmp_path):
    def copy(kind):
        dst = tmp_path / kind
        shutil.copytree(templates[kind], dst)
        return dst
    return copy


@pytest.fixture
def key_file(tmp_path):
    path = tmp_path / "hmac-key"
    path.write_bytes(KEY + b"\n")
    return path


def run_py(bundle, *args, cwd, python_flags=()):
    return subprocess.run([sys.executable, *python_flags, str(bundle / "run.py"), *args],
                          capture_output=True, text=True, cwd=cwd, timeout=120)


def manifest_of(bundle):
    return json.loads((bundle / "manifest.json").read_text())


# ------------------------------------------------------------------------- signatures
def test_garbage_signature_is_never_reported_signed(copy_of, key_file, tmp_path):
    bundle = copy_of("hmac")
    (bundle / "manifest.hmac").write_text("00" * 32 + "\n")
    with_key = run_py(bundle, "check", "--key", str(key_file), cwd=tmp_path)
    assert with_key.returncode == 1 and "signature does not match" in with_key.stderr
    without_key = run_py(bundle, "check", cwd=tmp_path)
    assert without_key.returncode == 1 and "signed" not in without_key.stdout
    assert "its signature was not checked; pass --key FILE" in without_key.stderr
    # --skip-signature (workstation) runs it, and says the signature was not verified
    skipped = run_py(bundle, "check", "--skip-signature", cwd=tmp_path)
    assert skipped.returncode == 0 and "signature NOT verified" in skipped.stdout


def test_check_says_signed_after_verifying(copy_of, key_file, tmp_path):
    ok = run_py(copy_of("hmac"), "check", "--key", str(key_file), "--require-signature",
                cwd=tmp_path)
    assert ok.returncode == 0, ok.stderr
    assert "signed (hmac-sha256 verified)" in ok.stdout
    plain = run_py(copy_of("plain"), "check", cwd=tmp_path)
    assert "unsigned (checksums catch corruption, not deliberate edits)" in plain.stdout


def test_lost_signature_file_is_refused(copy_of, tmp_path):
    bundle = copy_of("hmac")
    assert manifest_of(bundle)["signing"] == ["hmac-sha256"]
    (bundle / "manifest.hmac").unlink()
    p = run_py(bundle, "check", cwd=tmp_path)
    assert p.returncode == 1
    assert "packed with a hmac-sha256 signature but manifest.hmac is missing" in p.stderr


def unit_argv(unit: str, bundle: Path, verifier: Path, key: Path, state: Path, feed: Path):
    """The unit's ExecStart with the gateway's paths mapped onto this test's folders."""
    line = next(x for x in unit.splitlines() if x.startswith("ExecStart="))
    argv = shlex.split(line[len("ExecStart="):])
    assert argv[:3] == ["/usr/bin/python3", "-I", "-B"]
    mapping = {"/opt/ganlet/fixture-pump": str(bundle), VERIFIER: str(verifier),
               HMAC_KEY_FILE: str(key), PUBLIC_KEY_FILE: str(key),
               "/var/lib/ganlet/fixture-pump/readings.csv": str(feed)}
    out = [sys.executable, "-I", "-B"]
    for arg in argv[3:]:
        if arg == "--follow":
            continue
        out.append(mapping.get(arg, arg.replace("/var/lib/ganlet/fixture-pump", str(state))))
    return out


def test_the_shipped_unit_refuses_an_edited_rehashed_unsigned_copy(copy_of, key_file, tmp_path):
    """The field attack: edit manifest.json, re-hash, delete the signature. The unit written
    for a signed bundle runs the installed verifier with the key and --require-signature."""
    trusted = copy_of("hmac")  # as the workstation wrote it: its run.py is the verifier
    verifier = tmp_path / "verifier" / "run.py"
    verifier.parent.mkdir()
    shutil.copy2(trusted / "run.py", verifier)
    state = tmp_path / "state"
    state.mkdir()
    feed = tmp_path / "feed.csv"
    fx.write_csv(feed, fx.raw_values(40))
    argv = unit_argv(service_unit("fixture-pump", ["hmac-sha256"]), trusted, verifier,
                     key_file, state, feed)
    good = subprocess.run(argv, capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert good.returncode == 0, good.stderr

    m = manifest_of(trusted)
    m["threshold"]["level"] = 1e9  # never alert
    write_manifest(trusted, m)  # re-hashed, unsigned: manifest.hmac and "signing" gone
    assert not (trusted / "manifest.hmac").exists() and "signing" not in manifest_of(trusted)
    bad = subprocess.run(argv, capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert bad.returncode == 1 and "bundle refused" in bad.stderr and bad.stdout == ""
    # the same attack that also swaps the bundle's own run.py for one that checks nothing
    (trusted / "run.py").write_text("import sys\nsys.exit(0)\n")
    write_manifest(trusted, m)
    again = subprocess.run(argv, capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert again.returncode == 1 and "bundle refused" in again.stderr


def openssl_verifies(public_pem: Path, data: Path, signature_hex: str, tmp_path) -> bool:
    sig = tmp_path / "sig.bin"
    sig.write_bytes(bytes.fromhex(signature_hex))
    # reference: OpenSSL's own Ed25519 (RFC 8032) verification of the same bytes
    p = subprocess.run(["openssl", "pkeyutl", "-verify", "-pubin", "-inkey", str(public_pem),
                        "-rawin", "-in", str(data), "-sigfile", str(sig)],
                       capture_output=True, text=True)
    return p.returncode == 0 and "Signature Verified Successfully" in p.stdout


def openssl_keypair(folder: Path, name: str):
    private, public = folder / f"{name}.ed25519-private.pem", folder / f"{name}.ed25519-public.pem"
    subprocess.run(["openssl", "genpkey", "-algorithm", "ed25519", "-out", str(private)],
                   check=True, capture_output=True)
    subprocess.run(["openssl", "pkey", "-in", str(private), "-pubout", "-out", str(public)],
                   check=True, capture_output=True)
    return private, public


@needs_crypto
@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl is not installed")
def test_ed25519_signature_is_checked_with_the_public_key_alone(tmp_path):
    private, public = openssl_keypair(tmp_path, "site")
    _, other_public = openssl_keypair(tmp_path, "other")
    bundle = fx.build_bundle(tmp_path / "b", onnx_model=False,
                             ed25519_key=private.read_bytes())
    signature = (bundle / "manifest.ed25519").read_text().strip()
    assert openssl_verifies(public, bundle / "manifest.json", signature, tmp_path)
    assert manifest_of(bundle)["signing"] == ["ed25519"]
    ok = run_py(bundle, "check", "--public-key", str(public), "--require-signature",
                cwd=tmp_path, python_flags=("-I", "-B"))
    assert ok.returncode == 0, ok.stderr
    assert "signed (ed25519 verified)" in ok.stdout
    wrong = run_py(bundle, "check", "--public-key", str(other_public), cwd=tmp_path)
    assert wrong.returncode == 1 and "signature does not match" in wrong.stderr
    # an edited manifest no longer matches (and OpenSSL agrees)
    raw = (bundle / "manifest.json").read_bytes()
    (bundle / "manifest.json").write_bytes(raw.replace(b'"hop": 4', b'"hop": 5'))
    assert not openssl_verifies(public, bundle / "manifest.json", signature, tmp_path)
    edited = run_py(bundle, "check", "--public-key", str(public), cwd=tmp_path)
    assert edited.returncode == 1 and "signature does not match" in edited.stderr


BLOCK_CRYPTO = r"""
import sys, importlib.abc, runpy
class Blocker(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] == "cryptography":
            raise ImportError("blocked: " + name)
sys.meta_path.insert(0, Blocker())
sys.argv = sys.argv[1:]
runpy.run_path(sys.argv[0], run_name="__main__")
"""


@needs_crypto
def test_without_cryptography_the_gateway_says_what_to_install(tmp_path):
    private, public = tmp_path / "k.pem", tmp_path / "k.pub.pem"
    from ganlet.compile.cli import new_private_pem
    from ganlet.runtime.trust import ed25519_public_pem

    private.write_bytes(new_private_pem())
    public.write_bytes(ed25519_public_pem(private.read_bytes()))
    bundle = fx.build_bundle(tmp_path / "b", onnx_model=False, ed25519_key=private.read_bytes())
    p = subprocess.run([sys.executable, "-c", BLOCK_CRYPTO, str(bundle / "run.py"), "check",
                        "--public-key", str(public)], capture_output=True, text=True, cwd=tmp_path)
    assert p.returncode == 1
    assert "apt-get install python3-cryptography" in p.stderr and "pip install cryptography" in p.stderr


# ------------------------------------------------------------------ code before import
def test_a_planted_json_py_never_runs(copy_of, tmp_path):
    bundle = copy_of("plain")
    (bundle / "json.py").write_text(TRACE + "from json import *\n")
    p = run_py(bundle, "check", cwd=tmp_path)
    assert p.returncode == 1 and "json.py: Python file not listed" in p.stderr
    assert not (tmp_path / MARKER).exists()
    # even listed in a re-hashed manifest it never runs: the bundle root is not on sys.path
    write_manifest(bundle, manifest_of(bundle))
    listed = run_py(bundle, "check", cwd=tmp_path)
    assert listed.returncode == 0, listed.stderr
    assert not (tmp_path / MARKER).exists()


def _timestamped_pyc(source: Path, code_text: str) -> Path:
    """A .pyc of code_text that CPython takes for `source` (its mtime and size in the header)."""
    from importlib._bootstrap_external import _code_to_timestamp_pyc

    st = source.stat()
    pyc = Path(importlib.util.cache_from_source(str(source)))
    pyc.parent.mkdir(exist_ok=True)
    code = compile(code_text, str(source), "exec")
    pyc.write_bytes(bytes(_code_to_timestamp_pyc(code, int(st.st_mtime), st.st_size)))
    return pyc


def test_injected_bytecode_is_refused_even_when_signed(copy_of, key_file, tmp_path):
    bundle = copy_of("hmac")
    cli = bundle / "ganlet" / "runtime" / "cli.py"
    _timestamped_pyc(cli, TRACE + cli.read_text())
    p = run_py(bundle, "check", "--key", str(key_file), "--require-signature", cwd=tmp_path)
    assert p.returncode == 1 and "compiled bytecode inside the bundle" in p.stderr
    assert not (tmp_path / MARKER).exists()


def test_a_changed_code_file_is_refused_before_it_is_imported(copy_of, tmp_path):
    bundle = copy_of("plain")
    cli = bundle / "ganlet" / "runtime" / "cli.py"
    cli.write_text(TRACE + cli.read_text())
    p = run_py(bundle, "check", cwd=tmp_path)
    assert p.returncode == 1 and "ganlet/runtime/cli.py: SHA-256 does not match" in p.stderr
    assert not (tmp_path / MARKER).exists()


def test_the_runtime_is_imported_from_the_checked_folder_without_writing_bytecode(copy_of,
                                                                                 tmp_path):
    bundle = copy_of("plain")
    fx.write_csv(tmp_path / "in.csv", fx.raw_values(40))
    p = run_py(bundle, "stream", "--input", str(tmp_path / "in.csv"), cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    assert not list(bundle.rglob("__pycache__")) and not list(bundle.rglob("*.pyc"))
    # a second run still passes the no-bytecode rule
    assert run_py(bundle, "check", cwd=tmp_path).returncode == 0


# ----------------------------------------------------------------------- confined paths
@pytest.mark.parametrize("path", ["../outside.npz", "/tmp/outside.npz", "a/../../x.npz"])
def test_network_paths_are_confined_to_the_bundle(copy_of, tmp_path, path):
    bundle = copy_of("plain")
    shutil.copy2(bundle / "weights.npz", tmp_path / "outside.npz")
    m = manifest_of(bundle)
    m["network"]["weights"] = path
    (bundle / "manifest.json").write_text(json.dumps(m, sort_keys=True, indent=2) + "\n")
    with pytest.raises(BundleError, match="leaves the bundle folder"):
        load_bundle(bundle)
    p = run_py(bundle, "check", cwd=tmp_path)
    assert p.returncode == 1 and "leaves the bundle folder" in p.stderr


def test_a_symbolic_link_in_the_bundle_is_refused(copy_of, tmp_path):
    bundle = copy_of("plain")
    outside = tmp_path / "weights-elsewhere.npz"
    shutil.move(str(bundle / "weights.npz"), outside)
    os.symlink(outside, bundle / "weights.npz")  # same bytes, so the SHA-256 would match
    with pytest.raises(BundleError, match="weights.npz: a symbolic link inside the bundle"):
        load_bundle(bundle)
    p = run_py(bundle, "check", cwd=tmp_path)
    assert p.returncode == 1 and "symbolic link" in p.stderr


def test_an_unlisted_data_file_is_not_used(copy_of):
    bundle = copy_of("plain")
    shutil.copy2(bundle / "weights.npz", bundle / "other.npz")
    m = manifest_of(bundle)
    m["network"]["weights"] = "other.npz"  # exists, confined, but not in the hashed list
    (bundle / "manifest.json").write_text(json.dumps(m, sort_keys=True, indent=2) + "\n")
    with pytest.raises(BundleError, match="network.weights 'other.npz' is not a listed file"):
        load_bundle(bundle)


def test_run_py_is_python39_and_standard_library_only():
    import ast

    from ganlet.runtime.entry import RUN_PY

    # reference: CPython's own parser with the 3.9 grammar (ast.parse feature_version)
    tree = ast.parse(RUN_PY, feature_version=(3, 9))
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {a.name.split(".")[0] for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level == 0:
            imported.add(node.module.split(".")[0])
    # ganlet: only after the checks (_import_runtime); cryptography: optional, lazily
    assert imported <= set(sys.stdlib_module_names) | {"ganlet", "cryptography"}
    assert "numpy" not in imported
