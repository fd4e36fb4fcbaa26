"""Trust in a bundle before any of its code runs: signatures, paths, code files.

Standard library only and no import from this package: entry.py copies this file's text into
every bundle's run.py, which runs these checks BEFORE it imports anything from the bundle, so a
re-hashed manifest, a planted json.py or an injected .pyc never runs first. load_bundle
(manifest.py) runs the same checks in-process.

Signatures, each over the exact manifest.json bytes:
  manifest.hmac     hex HMAC-SHA256 under a shared secret key (standard library; RFC 2104)
  manifest.ed25519  hex Ed25519 signature (RFC 8032); the gateway checks it with the public key
                    alone, through the `cryptography` package (optional on the gateway)
The manifest's "signing" list names the signatures the packer wrote, so a bundle that lost a
signature file on the way is refused. The rule: a bundle with a signature runs only when at
least one of its signatures is verified with a key the operator gave, and every signature the
operator gave a key for must verify; --require-signature refuses a bundle with none.
"""

import hashlib
import hmac
import json
import os
import stat
from importlib.machinery import all_suffixes
from pathlib import Path, PurePosixPath

MANIFEST_NAME = "manifest.json"
HMAC_NAME = "manifest.hmac"
ED25519_NAME = "manifest.ed25519"
SIGNATURE_FILES = {"hmac-sha256": HMAC_NAME, "ed25519": ED25519_NAME}
KEY_OPTIONS = {"hmac-sha256": "--key", "ed25519": "--public-key"}
MIN_KEY_BYTES = 16
BYTECODE_DIR = "__pycache__"
CODE_SUFFIXES = tuple(sorted(set(all_suffixes()) | {".pyc", ".pyo"}))  # what `import` can load
CRYPTO_HINT = ("install the cryptography package (Debian: apt-get install python3-cryptography; "
               "elsewhere: pip install cryptography)")


class BundleError(Exception):
    """The bundle cannot be used. The message says what is wrong and what to do."""


def file_sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 16), b""):
            digest.update(block)
    return digest.hexdigest()


# ------------------------------------------------------------------------------------ keys
def read_key(path) -> bytes:
    """An HMAC key file: its bytes without surrounding whitespace (a trailing newline).
    Shared by the workstation (signing) and the gateway (checking): one rule for both."""
    key = Path(path).read_bytes().strip()
    if len(key) < MIN_KEY_BYTES:
        raise BundleError(f"{path}: the key holds {len(key)} bytes; use at least "
                          f"{MIN_KEY_BYTES} random bytes (head -c 32 /dev/urandom | base64 > KEY)")
    return key


def sign_bytes(key: bytes, data: bytes) -> str:
    return hmac.new(key, data, hashlib.sha256).hexdigest()


def _ed25519():
    try:
        from cryptography.exceptions import InvalidSignature
        from cryptography.hazmat.primitives import serialization
        from cryptography.hazmat.primitives.asymmetric import ed25519
    except ImportError:
        raise BundleError(f"Ed25519 signatures need the cryptography package; {CRYPTO_HINT}"
                          ) from None
    return serialization, ed25519, InvalidSignature


def ed25519_sign(private_pem: bytes, data: bytes) -> str:
    """Hex Ed25519 signature of data with a PEM (PKCS#8) private key, e.g. from
    `openssl genpkey -algorithm ed25519`."""
    serialization, ed25519, _ = _ed25519()
    try:
        key = serialization.load_pem_private_key(private_pem, password=None)
    except (ValueError, TypeError) as exc:
        raise BundleError(f"not a PEM private key without a passphrase ({exc})") from None
    if not isinstance(key, ed25519.Ed25519PrivateKey):
        raise BundleError("the private key is not an Ed25519 key")
    return key.sign(data).hex()


def ed25519_public_pem(private_pem: bytes) -> bytes:
    """The PEM public key (SubjectPublicKeyInfo) belonging to a PEM private key."""
    serialization, _, _ = _ed25519()
    key = serialization.load_pem_private_key(private_pem, password=None)
    return key.public_key().public_bytes(serialization.Encoding.PEM,
                                         serialization.PublicFormat.SubjectPublicKeyInfo)


def ed25519_verify(public_pem: bytes, data: bytes, signature_hex: str) -> bool:
    serialization, ed25519, invalid = _ed25519()
    try:
        key = serialization.load_pem_public_key(public_pem)
    except (ValueError, TypeError) as exc:
        raise BundleError(f"the public key is not a PEM public key ({exc})") from None
    if not isinstance(key, ed25519.Ed25519PublicKey):
        raise BundleError("the public key is not an Ed25519 key")
    try:
        key.verify(bytes.fromhex(signature_hex), data)
    except (ValueError, invalid):
        return False
    return True


# ------------------------------------------------------------------------------ signatures
def _signature_text(bundle_dir: Path, kind: str) -> str:
    try:
        return (bundle_dir / SIGNATURE_FILES[kind]).read_text(encoding="ascii").strip()
    except (UnicodeDecodeError, ValueError):
        return ""  # garbage never verifies


def _verify_one(bundle_dir: Path, kind: str, key: bytes, raw: bytes) -> None:
    given = _signature_text(bundle_dir, kind)
    if kind == "hmac-sha256":
        ok = hmac.compare_digest(sign_bytes(key, raw), given)
    else:
        ok = ed25519_verify(key, raw, given)
    if not ok:
        raise BundleError(
            f"{bundle_dir / SIGNATURE_FILES[kind]}: signature does not match manifest.json under "
            "the given key; the manifest was changed or the key is wrong - do not run this bundle"
        )


def declared_signatures(manifest: dict) -> list:
    declared = manifest.get("signing", [])
    if not isinstance(declared, list) or any(k not in SIGNATURE_FILES for k in declared):
        raise BundleError(f"manifest: signing must list signature kinds of "
                          f"{', '.join(SIGNATURE_FILES)}, got {declared!r}; re-pack the bundle")
    return declared


def check_signatures(bundle_dir, raw: bytes, manifest: dict, keys: dict,
                     require: bool = False, skip: bool = False) -> dict:
    """Signature kind -> "verified" | "not checked". keys: kind -> key bytes (HMAC secret or
    PEM public key). Raises BundleError when the bundle must not run."""
    bundle_dir = Path(bundle_dir)
    if skip and require:
        raise BundleError("--skip-signature and --require-signature exclude each other")
    present = {k for k, name in SIGNATURE_FILES.items() if (bundle_dir / name).is_file()}
    for kind in declared_signatures(manifest):
        if kind not in present:
            raise BundleError(f"{bundle_dir}: the bundle was packed with a {kind} signature but "
                              f"{SIGNATURE_FILES[kind]} is missing; copy the whole bundle again")
    report = {k: "not checked" for k in sorted(present)}
    for kind, key in sorted(keys.items()):
        if key is None:
            continue
        if kind not in present:
            raise BundleError(f"{bundle_dir}: a {kind} key was given but the bundle has no "
                              f"{SIGNATURE_FILES[kind]}; re-pack it with the signing key")
        _verify_one(bundle_dir, kind, key, raw)
        report[kind] = "verified"
    verified = "verified" in report.values()
    if require and not verified:
        raise BundleError("a signature is required but no key was given; pass --key FILE "
                          "(HMAC) or --public-key FILE (Ed25519)")
    if present and not verified and not skip:
        options = " or ".join(f"{KEY_OPTIONS[k]} FILE" for k in sorted(present))
        raise BundleError(f"{bundle_dir}: the bundle is signed ({', '.join(sorted(present))}) "
                          f"but its signature was not checked; pass {options} (a workstation "
                          "test may pass --skip-signature)")
    return report


# ---------------------------------------------------------------------------------- layout
def safe_relative(rel) -> bool:
    """A manifest path: relative, forward slashes, no '..', no empty or '.' parts."""
    if not isinstance(rel, str) or not rel or "\\" in rel or "\0" in rel:
        return False
    p = PurePosixPath(rel)
    return not p.is_absolute() and all(part not in ("", ".", "..") for part in rel.split("/"))


def scan_tree(bundle_dir: Path) -> dict:
    """Every entry under bundle_dir without following links: regular files, symlinks and
    bytecode (relative posix paths)."""
    found = {"files": [], "links": [], "bytecode": []}
    for top, dirs, files in os.walk(str(bundle_dir), followlinks=False):
        rel_top = Path(top).relative_to(bundle_dir)
        for name in sorted(dirs + files):
            rel = (rel_top / name).as_posix()
            mode = os.lstat(os.path.join(top, name)).st_mode
            if stat.S_ISLNK(mode):
                found["links"].append(rel)
            elif name == BYTECODE_DIR or name.endswith((".pyc", ".pyo")):
                found["bytecode"].append(rel)
            elif stat.S_ISREG(mode):
                found["files"].append(rel)
    return found


def check_layout(bundle_dir, manifest: dict) -> None:
    """Paths confined to the folder; no links, no bytecode, no code the manifest does not list."""
    bundle_dir = Path(bundle_dir)
    files = manifest.get("files")
    if not isinstance(files, dict):
        raise BundleError("manifest: files must be an object of path -> sha256; re-pack it")
    net = manifest.get("network") if isinstance(manifest.get("network"), dict) else {}
    paths = list(files) + [net[k] for k in ("weights", "onnx") if k in net]
    for rel in paths:
        if not safe_relative(rel):
            raise BundleError(f"manifest: path {rel!r} leaves the bundle folder (absolute, '..' "
                              "or malformed); do not run this bundle")
    tree = scan_tree(bundle_dir)
    if tree["links"]:
        raise BundleError(f"{tree['links'][0]}: a symbolic link inside the bundle; bundles hold "
                          "plain files only - copy the bundle again without links")
    if tree["bytecode"]:
        raise BundleError(f"{tree['bytecode'][0]}: compiled bytecode inside the bundle; only the "
                          "listed source may run - delete it (run with python3 -I -B)")
    stray = [r for r in tree["files"] if r.endswith(CODE_SUFFIXES) and r not in files]
    if stray:
        raise BundleError(f"{stray[0]}: Python file not listed in the manifest; remove it "
                          "(only packed code may run from a bundle)")


def check_hashes(bundle_dir, files: dict, code_only: bool = False) -> None:
    bundle_dir = Path(bundle_dir)
    for rel, digest in sorted(files.items()):
        if code_only and not rel.endswith(CODE_SUFFIXES):
            continue
        fpath = bundle_dir / rel
        if not fpath.is_file():
            raise BundleError(f"{rel}: listed in the manifest but missing from {bundle_dir}; "
                              "copy the whole bundle folder again")
        if file_sha256(fpath) != digest:
            raise BundleError(f"{rel}: SHA-256 does not match the manifest (file changed or "
                              "corrupted); copy the bundle again and do not edit files inside it")


def read_manifest(bundle_dir) -> tuple:
    """(raw bytes, parsed object) of manifest.json."""
    mpath = Path(bundle_dir) / MANIFEST_NAME
    if not mpath.is_file():
        raise BundleError(f"{mpath}: no manifest.json here; point at the bundle folder")
    raw = mpath.read_bytes()
    try:
        manifest = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise BundleError(f"{mpath}: not valid JSON ({exc}); copy the bundle again") from None
    if not isinstance(manifest, dict):
        raise BundleError("manifest: top level must be a JSON object; re-pack the bundle")
    return raw, manifest


def read_keys(hmac_key_file=None, public_key_file=None) -> dict:
    """Signature kind -> key bytes from the operator's key files (None where not given)."""
    return {"hmac-sha256": read_key(hmac_key_file) if hmac_key_file else None,
            "ed25519": Path(public_key_file).read_bytes() if public_key_file else None}


def verify_trust(bundle_dir, raw: bytes, manifest: dict, keys: dict, require: bool = False,
                 skip: bool = False, check_code: bool = True) -> dict:
    """Everything that must hold before bundle code may run; the signature report.
    check_code=False: for tools that only read the manifest and never import the copy."""
    check_layout(bundle_dir, manifest)
    report = check_signatures(bundle_dir, raw, manifest, keys, require, skip)
    if check_code:
        check_hashes(bundle_dir, manifest["files"], code_only=True)
    return report
