"""Pack: the last stage of compile. The parts made by the earlier stages (int8 weights, ONNX
model, manifest) become a self-contained bundle folder, written beside its final place, checked
against the board's flash budget, and only then renamed into place: a failure leaves the
previous bundle (or nothing) where it was.
"""

from __future__ import annotations

import re
import shutil
import tarfile
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np

import ganlet.runtime as runtime_pkg
from ganlet.compile.export import save_onnx
from ganlet.runtime.entry import RUN_PY
from ganlet.runtime.manifest import MANIFEST_NAME, ONNX_NAME, WEIGHTS_NAME, write_manifest

RUNTIME_DIR = Path(runtime_pkg.__file__).resolve().parent
# A bundle name becomes file and service names on the gateway: keep it to a portable set.
NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


# Where things go on the gateway. Every path below is built from a name NAME_RE accepted, whose
# characters (letters, digits, '.', '_', '-') are all valid in systemd unit names and paths and
# need no quoting or escaping in a unit file ('%', '$', '\\', quotes and spaces cannot occur).
BUNDLE_ROOT = "/opt/ganlet"
STATE_ROOT = "/var/lib/ganlet"  # StateDirectory=ganlet/NAME
KEYS_DIR = "/etc/ganlet/keys"
VERIFIER = "/usr/local/lib/ganlet/run.py"  # installed once: checks signed bundles from outside
HMAC_KEY_FILE = f"{KEYS_DIR}/bundle-signing.hmac-key"
PUBLIC_KEY_FILE = f"{KEYS_DIR}/bundle-signing.ed25519-public.pem"
SERVICE_USER = "ganlet"
SCORES_MAX_MB = 16

UNIT_TEMPLATE = """# {unit_name}: made by ganlet compile for bundle {name}
[Unit]
Description=ganlet advisory condition monitoring ({name})
Documentation=file://{bundle}/INSTALL.txt
{network}
[Service]
Type=simple
User={user}
Group={user}
StateDirectory=ganlet/{name}
StateDirectoryMode=0750
WorkingDirectory={state}
ExecStart=/usr/bin/python3 -I -B {run_py} stream {bundle_option}--input {state}/readings.csv --follow --state {state}/state.json --alert-db {state}/alerts.sqlite --scores-out {state}/scores.csv --scores-max-mb {max_mb}{signature}
Restart=always
RestartSec=5
NoNewPrivileges=yes
ProtectSystem=strict
ProtectHome=yes
PrivateTmp=yes
PrivateDevices=yes
UMask=0027

[Install]
WantedBy=multi-user.target
"""


def unit_name(name: str) -> str:
    return f"ganlet-{check_name(name)}.service"


def signature_options(signing) -> str:
    """The unit's signature options: the public key when there is one (the gateway then holds
    no secret), else the HMAC key; nothing for an unsigned bundle."""
    if "ed25519" in signing:
        return f" --public-key {PUBLIC_KEY_FILE} --require-signature"
    if "hmac-sha256" in signing:
        return f" --key {HMAC_KEY_FILE} --require-signature"
    return ""


def service_unit(name: str, signing=(), mqtt: bool = False) -> str:
    """The systemd unit of bundle `name`. A signed bundle is checked by the verifier installed
    outside it (VERIFIER) and must carry a verified signature; the network is waited for only
    when the service talks MQTT."""
    name = check_name(name)
    bundle = f"{BUNDLE_ROOT}/{name}"
    signed = bool(signature_options(signing))
    return UNIT_TEMPLATE.format(
        unit_name=unit_name(name), name=name, bundle=bundle, state=f"{STATE_ROOT}/{name}",
        user=SERVICE_USER, max_mb=SCORES_MAX_MB, signature=signature_options(signing),
        run_py=VERIFIER if signed else f"{bundle}/run.py",
        bundle_option=f"--bundle {bundle} " if signed else "",
        network=("After=network-online.target\nWants=network-online.target\n" if mqtt else ""))


INSTALL_TXT = """ganlet bundle {name} for board {board}
==========================================================

Detection is advisory condition monitoring. It is NOT a safety function and does not replace
trips, interlocks, relief valves, protection relays or the machine maker's limits; local codes
and licensed practice govern the installation.

Needs: Python >= 3.9 and numpy on the gateway (onnxruntime is used when present{crypto_need}).
No pip install of ganlet: this folder carries its own copy of the runtime.

What the bundle's checks prove: {trust}

1. Copy the folder:       scp -r {folder} gateway:/tmp/{name}
   and install it read-only for everyone but root:
     install -d {bundle_root} && cp -r /tmp/{name} {bundle}
     chown -R root:root {bundle} && chmod -R go-w {bundle}
2. The service user:      useradd --system --user-group --no-create-home --home-dir /nonexistent --shell /usr/sbin/nologin {user}
{signed_steps}3. Check it:              python3 -I -B {run_py} check{check_options}
4. Try it on a file:      python3 -I -B {run_py} stream{check_options} --input readings.csv --scores-out scores.csv
5. Run it as a service, reading the sensor feed from a growing CSV file
   {state}/readings.csv (whatever writes it must be able to write there: run it as
   {user}, or give it the group). The unit is also in this folder as {unit_name}:

     cp {bundle}/{unit_name} /etc/systemd/system/
     systemctl daemon-reload && systemctl enable --now {unit_name}

----- {unit_name} -----
{unit}----- end of {unit_name} -----

6. Measure it on the board:  python3 -I -B {run_py} bench{check_options}

Exit codes of run.py: 0 done or stopped by a signal; 1 bundle refused (checksums, signature,
an older bundle than the state folder has run - pass --allow-older once if you mean to go
back); 2 bad usage or input header; 3 state file or input unusable at start; 4 internal error.
A full disk or read-only store for the scores CSV or the alert database does not stop
detection: it is reported as a sink_error event and retried.

Input: CSV with a header naming the time column ({time_col}) and the channels
({channels}), any order, extra columns ignored; one row every {period:g} s.
Always send the raw reading: a channel marked "(rate)" is watched by its change per period,
which the gateway works out itself.
"""

TRUST_UNSIGNED = """this bundle is UNSIGNED. Its SHA-256 list catches
corruption (a bad copy, a flipped bit, a truncated file); it does NOT catch a deliberate edit,
because whoever edits a file can re-hash it. Keep the folder writable by root only, or compile
with --sign-ed25519 (or --sign-key) to have edits refused."""
TRUST_SIGNED = """this bundle is SIGNED ({kinds}). Checked with the key below, any
edit of its files or manifest, or a removed signature, is refused before any of its code runs.
The checker is run.py itself, so the unit runs a copy installed once outside the bundle
({verifier}); a bundle older than the newest one the service has run is refused too."""

SIGNED_STEPS = """   The verifier, installed once from a bundle as the workstation wrote it (before it
   travelled), so a changed copy inside a bundle cannot vouch for itself:
     install -D -m 0644 -o root -g root run.py {verifier}
   The key, outside the bundle, readable by the service user only:
     install -d -m 0750 -o root -g {user} {keys_dir}
     install -m 0640 -o root -g {user} {key_source} {key_file}
"""


def install_text(name: str, board: str, folder: str, time_col: str, channels: str,
                 period: float, signing=(), mqtt: bool = False) -> str:
    """INSTALL.txt of a bundle: install steps, the unit, the security model in plain words."""
    name = check_name(name)
    bundle, options = f"{BUNDLE_ROOT}/{name}", signature_options(signing)
    signed = bool(options)
    key_file = PUBLIC_KEY_FILE if "ed25519" in signing else HMAC_KEY_FILE
    key_source = ("THE-PUBLIC-KEY.pem" if "ed25519" in signing else "THE-HMAC-KEY-FILE")
    steps = SIGNED_STEPS.format(verifier=VERIFIER, user=SERVICE_USER, keys_dir=KEYS_DIR,
                                key_source=key_source, key_file=key_file) if signed else ""
    trust = (TRUST_SIGNED.format(kinds=", ".join(signing), verifier=VERIFIER) if signed
             else TRUST_UNSIGNED)
    return INSTALL_TXT.format(
        name=name, board=board, folder=folder, time_col=time_col, channels=channels,
        period=period, trust=trust, bundle=bundle, bundle_root=BUNDLE_ROOT, user=SERVICE_USER,
        signed_steps=steps, run_py=VERIFIER if signed else f"{bundle}/run.py",
        check_options=(f" --bundle {bundle}" + options) if signed else "",
        state=f"{STATE_ROOT}/{name}", unit_name=unit_name(name),
        unit=service_unit(name, signing, mqtt),
        crypto_need="; Ed25519 signatures need python3-cryptography" if "ed25519" in signing
        else "")


def safe_name(text: str) -> str:
    """A name NAME_RE accepts, made from any text (runs of other characters become '-')."""
    return re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-._")[:64] or "detector"


def check_name(name: str) -> str:
    """Refuse a bundle name that cannot be a file or service name, before any work."""
    if NAME_RE.match(name):
        return name
    suggestion = safe_name(name)
    raise ValueError(f"--name {name!r}: use letters, digits, '.', '_' and '-' (up to 64, "
                     f"starting with a letter or digit), e.g. {suggestion!r}; the name becomes "
                     "file and service names on the gateway")


def check_out(out: Path) -> Path:
    """Refuse an unusable --out before minutes of distillation, not after."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out} is a file; --out needs a folder for the bundle")
    if out.exists() and any(out.iterdir()) and not (out / MANIFEST_NAME).exists():
        raise ValueError(f"{out} exists and is not a bundle; choose an empty or new folder")
    return out


def copy_runtime(bundle: Path) -> None:
    pkg = bundle / "ganlet" / "runtime"
    pkg.mkdir(parents=True, exist_ok=True)
    (bundle / "ganlet" / "__init__.py").write_text("")
    for src in sorted(RUNTIME_DIR.glob("*.py")):
        shutil.copy2(src, pkg / src.name)


@dataclass
class Packed:
    bundle: Path
    archive: Optional[Path]
    bytes: dict             # model_and_weights (outside the runtime copy), total, per file


def pack_bundle(out: Path, manifest: dict, qweights: dict, onnx_model, install: str,
                storage_budget_kb: float, sign_key: Optional[bytes] = None,
                archive: bool = False, ed25519_key: Optional[bytes] = None,
                unit: Optional[str] = None) -> Packed:
    """install: INSTALL.txt; unit: the systemd unit, written as ganlet-NAME.service."""
    out = check_out(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        save_onnx(onnx_model, tmp / ONNX_NAME)
        np.savez(tmp / WEIGHTS_NAME, **qweights)
        copy_runtime(tmp)
        (tmp / "run.py").write_text(RUN_PY)
        (tmp / "INSTALL.txt").write_text(install)
        if unit is not None:
            (tmp / unit_name(manifest["name"])).write_text(unit)
        write_manifest(tmp, manifest, sign_key=sign_key, ed25519_key=ed25519_key)
        sizes = {p.relative_to(tmp).as_posix(): p.stat().st_size
                 for p in tmp.rglob("*") if p.is_file()}
        core = sum(v for k, v in sizes.items() if not k.startswith("ganlet/"))
        if core > storage_budget_kb * 1024:
            raise ValueError(f"the packed bundle is {core / 1024:.1f} KB without the runtime "
                             f"copy, over the board's {storage_budget_kb} KB budget; choose a "
                             "larger board")
        _replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    packed = Packed(out, None, {"model_and_weights": core, "total": sum(sizes.values()),
                                "files": sizes})
    stale = out.with_name(out.name + ".tar.gz")
    if archive:
        packed.archive = _archive(out, stale)
    elif stale.exists():
        stale.unlink()  # an archive of an earlier bundle would no longer match the folder
    return packed


def _replace(new: Path, out: Path) -> None:
    """Put the finished folder in place; the previous bundle goes only once the new one is in."""
    old = None
    if out.exists():
        old = Path(tempfile.mkdtemp(prefix=f".{out.name}.previous-", dir=out.parent))
        out.rename(old / "bundle")
    new.rename(out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _archive(out: Path, target: Path) -> Path:
    partial = target.with_name(target.name + ".partial")
    with tarfile.open(partial, "w:gz") as tar:
        tar.add(out, arcname=out.name)
    partial.replace(target)
    return target
