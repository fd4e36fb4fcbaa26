"""Gateway interpreters a test can run a bundle under, to prove the gateway claims on real
targets (issue 12):

- "host": this interpreter (sys.executable), the workstation.
- "py39-numpy1.19": Python 3.9 with numpy 1.19.5, the oldest the board profiles promise
  (boards/a53-512.toml), in a venv built by scripts/gateway_py39.sh (~20 s, once per machine).
- "arm64-debian": Debian's own arm64 python3.11 and python3-numpy packages run under
  qemu-user-static as a Cortex-A53, built by scripts/gateway_arm64.sh (~2 min once per machine;
  needs root, apt and Debian's registry).

Both builds live in ${XDG_CACHE_HOME:-~/.cache}/ganlet/ and are reused. The first call here
runs each builder (a few seconds when already built); GANLET_NO_BUILD=1 uses only what is
already built. Run a bundle as
    subprocess.run([*gw.argv_prefix, "run.py", "check"], env=gw.env)
"""

import functools
import os
import platform
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Dict, List, Optional, Tuple, Union

import numpy as np

SCRIPTS = Path(__file__).resolve().parent.parent / "scripts"
NAMES = ("host", "py39-numpy1.19", "arm64-debian")
BUILD_TIMEOUT_S = 1200  # a first arm64 build took 105 s here; apt mirrors can be slower


@dataclass(frozen=True)
class Gateway:
    name: str
    argv_prefix: Tuple[str, ...]  # what comes before "run.py ..." on the command line
    env: Dict[str, str]
    python_version: str
    numpy_version: str


def cache_dir() -> Path:
    return Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "ganlet"


def _gateway_env() -> Dict[str, str]:
    """The caller's environment without the workstation's Python paths; no bytecode written
    into the bundle or the shared userland."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    return env


def _run_builder(script: str, folder: Path) -> Dict[str, str]:
    """Run a builder; returns its 'versions: k=v ...' line as a dict, raises RuntimeError
    with the builder's own last words when it cannot."""
    try:
        proc = subprocess.run(["bash", str(SCRIPTS / script), str(folder)], capture_output=True,
                              text=True, timeout=BUILD_TIMEOUT_S, stdin=subprocess.DEVNULL)
    except (OSError, subprocess.TimeoutExpired) as exc:
        raise RuntimeError(f"{script}: {exc}") from exc
    lines = [x for x in proc.stdout.splitlines() if x.startswith("versions: ")]
    if proc.returncode != 0 or not lines:
        said = (proc.stderr.strip().splitlines() or ["(no message)"])[-1]
        raise RuntimeError(f"{script} exited {proc.returncode}: {said}")
    return dict(item.split("=", 1) for item in lines[-1].split()[1:])


def _host() -> Gateway:
    return Gateway("host", (sys.executable,), dict(os.environ), platform.python_version(),
                   np.__version__)


def _py39() -> Gateway:
    venv = cache_dir() / "py39-venv"
    v = _run_builder("gateway_py39.sh", venv)
    return Gateway("py39-numpy1.19", (str(venv / "bin" / "python"),), _gateway_env(),
                   v["python"], v["numpy"])


def _arm64() -> Gateway:
    root = cache_dir() / "arm64-root"
    v = _run_builder("gateway_arm64.sh", root)
    # the same command line the builder checked; Debian's site.py adds ROOT's dist-packages
    argv = ("qemu-aarch64-static", "-L", str(root), "-cpu", "cortex-a53",
            str(root / "usr" / "bin" / "python3.11"))
    return Gateway("arm64-debian", argv, _gateway_env(), v["python"], v["numpy"])


_MAKERS = {"host": _host, "py39-numpy1.19": _py39, "arm64-debian": _arm64}


@functools.cache
def _probe(name: str) -> Union[Gateway, str]:
    """The gateway, or why it is absent; each one is probed once per test session."""
    try:
        return _MAKERS[name]()
    except RuntimeError as exc:
        return str(exc)


def gateway(name: str) -> Optional[Gateway]:
    found = _probe(name)
    return found if isinstance(found, Gateway) else None


def available_gateways() -> List[Gateway]:
    return [g for g in map(gateway, NAMES) if g is not None]


def skip_reason(name: str) -> Optional[str]:
    """Why `name` is unavailable here (None when it is available)."""
    found = _probe(name)
    return None if isinstance(found, Gateway) else f"gateway {name} unavailable: {found}"
