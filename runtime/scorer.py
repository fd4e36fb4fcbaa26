"""Network backends: reconstructions from the numpy LSTM or from onnxruntime.

Both take scaled float32 windows [N, L, C] and return G(E(x)) [N, L, C]; score.py turns window
and reconstruction into the score for both, so the two backends can only differ by the network
arithmetic itself.
"""

import numpy as np

from .lstm import Network
from .manifest import ONNX_INPUT, ONNX_RECONSTRUCTION, BundleError

BACKENDS = ("auto", "numpy", "onnxruntime")


def _as_windows(windows, n_channels: int) -> np.ndarray:
    w = np.ascontiguousarray(windows, dtype=np.float32)
    if w.ndim != 3 or w.shape[2] != n_channels:
        raise ValueError(f"windows must be [N, L, {n_channels}], got {w.shape}")
    return w


class NetworkScorer:
    """The numpy LSTM on a float32 weight dict: the bundle's own (dequantised int8), or another
    network of the same contract (the workstation's fp32 student, in `ganlet verify`)."""

    def __init__(self, weights, name: str = "numpy"):
        self.name = name
        self.network = Network(weights)
        self.n_channels = self.network.n_channels

    def reconstruct(self, windows) -> np.ndarray:
        return self.network.reconstruct(_as_windows(windows, self.n_channels))


class OnnxRuntimeScorer:
    name = "onnxruntime"

    def __init__(self, bundle):
        import onnxruntime as ort  # optional on the gateway; make_scorer handles its absence

        self.n_channels = len(bundle.channels)
        opts = ort.SessionOptions()
        # one thread: a gateway shares its cores with other services, and results reproduce
        opts.intra_op_num_threads = 1
        opts.inter_op_num_threads = 1
        self.session = ort.InferenceSession(
            str(bundle.onnx_path), opts, providers=["CPUExecutionProvider"]
        )
        inputs = [i.name for i in self.session.get_inputs()]
        outputs = [o.name for o in self.session.get_outputs()]
        if ONNX_INPUT not in inputs or ONNX_RECONSTRUCTION not in outputs:
            raise BundleError(
                f"{bundle.onnx_path}: expected input {ONNX_INPUT!r} and output "
                f"{ONNX_RECONSTRUCTION!r}, found inputs {inputs} outputs {outputs}; re-pack "
                "the bundle"
            )

    def reconstruct(self, windows) -> np.ndarray:
        w = _as_windows(windows, self.n_channels)
        (recon,) = self.session.run([ONNX_RECONSTRUCTION], {ONNX_INPUT: w})
        return np.asarray(recon, dtype=np.float32)


def onnxruntime_available() -> bool:
    try:
        import onnxruntime  # noqa: F401
    except ImportError:
        return False
    return True


def available_backends(bundle) -> list:
    out = ["numpy"]
    if onnxruntime_available() and bundle.onnx_path.is_file():
        out.append("onnxruntime")
    return out


def make_scorer(bundle, backend: str = "auto"):
    """auto = onnxruntime when importable and model.onnx is present, else numpy."""
    if backend not in BACKENDS:
        raise ValueError(f"unknown backend {backend!r}; choose one of {', '.join(BACKENDS)}")
    if backend == "auto":
        backend = "onnxruntime" if "onnxruntime" in available_backends(bundle) else "numpy"
    if backend == "numpy":
        return NetworkScorer(bundle.weights)
    if not onnxruntime_available():
        raise BundleError(
            "backend 'onnxruntime' was asked for but the onnxruntime package cannot be imported "
            "on this machine; install it (pip install onnxruntime) or use --backend numpy"
        )
    if not bundle.onnx_path.is_file():
        raise BundleError(
            f"backend 'onnxruntime' needs {bundle.onnx_path.name} but the bundle has none; "
            "use --backend numpy"
        )
    return OnnxRuntimeScorer(bundle)
