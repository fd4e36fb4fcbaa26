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


INSTALL_TXT = """ganlet bundle {name} for board {board}
==========================================================

Detection is advisory condition monitoring. It is NOT a safety function and does not replace
trips, interlocks, relief valves, protection relays or the machine maker's limits; local codes
and licensed practice govern the installation.

Needs: Python >= 3.9 and numpy on the gateway (onnxruntime is used when present). No pip
install of ganlet: this folder carries its own copy of the runtime.

1. Copy the folder, e.g.   scp -r {folder} gateway:/opt/ganlet/{name}
2. Check it:              python3 /opt/ganlet/{name}/run.py check
                          (add --key FILE --require-signature if the bundle is signed)
3. Try it on a file:      python3 run.py stream --input readings.csv --scores-out scores.csv
4. Run it as a service, reading the sensor feed on stdin or from a growing CSV file:

   # /etc/systemd/system/ganlet-{name}.service
   [Unit]
   Description=ganlet advisory condition monitoring ({name})
   After=network.target

   [Service]
   Type=simple
   WorkingDirectory=/opt/ganlet/{name}
   ExecStart=/usr/bin/python3 /opt/ganlet/{name}/run.py stream --input /var/lib/ganlet/{name}.csv --follow --state /var/lib/ganlet/{name}.state.json --alert-db /var/lib/ganlet/{name}.alerts.sqlite
   Restart=always
   RestartSec=5
   User=ganlet

   [Install]
   WantedBy=multi-user.target

   then: systemctl daemon-reload && systemctl enable --now ganlet-{name}

5. Measure it on the board:  python3 run.py bench

Input: CSV with a header naming the time column ({time_col}) and the channels
({channels}), any order, extra columns ignored; one row every {period:g} s.
Always send the raw reading: a channel marked "(rate)" is watched by its change per period,
which the gateway works out itself.
"""



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


def pack_bundle(out: Path, manifest: dict, qweights: dict, onnx_model, install_text: str,
                storage_budget_kb: float, sign_key: Optional[bytes] = None,
                archive: bool = False) -> Packed:
    out = check_out(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        save_onnx(onnx_model, tmp / ONNX_NAME)
        np.savez(tmp / WEIGHTS_NAME, **qweights)
        copy_runtime(tmp)
        (tmp / "run.py").write_text(RUN_PY)
        (tmp / "INSTALL.txt").write_text(install_text)
        write_manifest(tmp, manifest, sign_key=sign_key)
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
