"""Smoke test of a gateway interpreter, shared by gateway_arm64.sh and gateway_py39.sh: what the
gateway runtime imports, one matmul through the interpreter's BLAS, and a 'versions:' line that
tests/gateways.py reads. Python 3.9 syntax, stdlib + numpy only."""
import hashlib  # noqa: F401  (the runtime's imports: each must exist on the gateway)
import hmac  # noqa: F401
import json  # noqa: F401
import resource  # noqa: F401
import signal  # noqa: F401
import sqlite3  # noqa: F401
import sys
import tempfile  # noqa: F401

import numpy as np

a = np.arange(12, dtype=np.float32).reshape(3, 4)
assert float((a @ a.T).sum()) == 1134.0  # |column sums|^2 = 12^2+15^2+18^2+21^2
try:
    from importlib.metadata import version

    import paho.mqtt.client  # noqa: F401  (optional on the gateway)
    paho = version("paho-mqtt")
except ImportError:
    paho = "absent"
major, minor, micro = sys.version_info[:3]
print(f"versions: python={major}.{minor}.{micro} numpy={np.__version__} paho-mqtt={paho}")
