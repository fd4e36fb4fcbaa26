"""The contract weight dict -> an ONNX model, written node by node with onnx.helper.

Built by hand (not torch.onnx.export) so the graph holds exactly the weights.npz numbers: int8
initializers with their float32 scales, DequantizeLinear nodes, and standard ONNX LSTM nodes.
The numpy runtime and onnxruntime then compute from identical values.

Graph (opset 20, LSTM layout=0 i.e. [time, batch, features]):
    window [N, L, C] -> Transpose -> enc LSTM stack -> enc head -> gen LSTM stack -> gen head
    -> Transpose -> reconstruction [N, L, C];  residuals [N, C] = mean_t (window - recon)^2
"""

import os
from typing import Dict, List, Tuple, Union

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from ganlet.runtime.lstm import architecture
from ganlet.runtime.manifest import ONNX_INPUT, ONNX_OPSET, ONNX_RECONSTRUCTION, ONNX_RESIDUALS
from ganlet.runtime.weights import SCALE_SUFFIX, row_axis

INPUT = ONNX_INPUT
OUTPUTS = (ONNX_RECONSTRUCTION, ONNX_RESIDUALS)


class _Graph:
    """Collects nodes and initializers; names come from the contract keys."""

    def __init__(self, weights: Dict[str, np.ndarray], quantised: bool):
        self.weights = weights
        self.quantised = quantised
        self.nodes: List[onnx.NodeProto] = []
        self.inits: List[onnx.TensorProto] = []

    def const(self, name: str, value: np.ndarray) -> str:
        self.inits.append(numpy_helper.from_array(np.asarray(value), name))
        return name

    def node(self, op: str, inputs: List[str], output: str, **attrs) -> str:
        self.nodes.append(helper.make_node(op, inputs, [output], name=output, **attrs))
        return output

    def tensor(self, key: str) -> str:
        """A float32 tensor for contract key: the initializer itself, or DequantizeLinear of it."""
        axis = row_axis(key)
        value = self.weights[key]
        if axis is None or not self.quantised:
            return self.const(key, np.asarray(value, dtype=np.float32))
        q = self.const(key, value)
        s = self.const(key + SCALE_SUFFIX, self.weights[key + SCALE_SUFFIX])
        # Zero point omitted: the operator's default is 0 of the input's type (int8).
        return self.node("DequantizeLinear", [q, s], key + ".dq", axis=axis)


def _check_weights(weights: Dict[str, np.ndarray], n_channels: int, quantised: bool):
    """int8 + scale for every matrix when quantised (float32 otherwise), and the shapes of the
    network contract for n_channels; returns runtime.lstm.architecture of the weights."""
    for key, value in weights.items():
        if key.endswith(SCALE_SUFFIX) or row_axis(key) is None:
            continue
        is_int8 = np.asarray(value).dtype == np.int8
        if quantised and not (is_int8 and key + SCALE_SUFFIX in weights):
            raise ValueError(
                f"{key!r} is not int8 with a {key + SCALE_SUFFIX!r}: pass quantise_weights(...) "
                "output, or build_onnx(..., quantised=False) for float32 weights"
            )
        if not quantised and is_int8:
            raise ValueError(f"{key!r} is int8: use quantised=True (or dequantise_weights first)")
    arch = architecture({k: v for k, v in weights.items() if not k.endswith(SCALE_SUFFIX)})
    if arch[0] != n_channels:
        raise ValueError(f"the weights read {arch[0]} channels, model built for {n_channels}")
    return arch


def build_onnx(
    weights: Dict[str, np.ndarray], n_channels: int, opset: int = ONNX_OPSET,
    quantised: bool = True
) -> onnx.ModelProto:
    """ONNX model of E then G from a contract dict (int8 + scales, or float32 with quantised=False)."""
    _, enc, _, gen = _check_weights(weights, n_channels, quantised)
    g = _Graph(weights, quantised)
    squeeze_axes = g.const("axes_num_directions", np.array([1], dtype=np.int64))
    time_axis = g.const("axes_time", np.array([1], dtype=np.int64))

    x = g.node("Transpose", [INPUT], "window_tnc", perm=[1, 0, 2])  # [L, N, C]
    for net, sizes in (("enc", enc), ("gen", gen)):
        for k in range(len(sizes)):
            key = f"{net}.lstm{k}"
            hidden = int(weights[f"{key}.R"].shape[2])
            w, r, b = (g.tensor(f"{key}.{p}") for p in ("W", "R", "B"))
            y = g.node("LSTM", [x, w, r, b], f"{key}.Y", hidden_size=hidden, layout=0)
            x = g.node("Squeeze", [y, squeeze_axes], f"{key}.out")  # [L, 1, N, H] -> [L, N, H]
        # Linear head per time step: x @ W.T + b.
        w_t = g.node("Transpose", [g.tensor(f"{net}.head.W")], f"{net}.head.WT", perm=[1, 0])
        x = g.node("MatMul", [x, w_t], f"{net}.head.mm")
        x = g.node("Add", [x, g.tensor(f"{net}.head.b")], f"{net}.head.out")

    recon = g.node("Transpose", [x], OUTPUTS[0], perm=[1, 0, 2])  # back to [N, L, C]
    diff = g.node("Sub", [INPUT, recon], "diff")
    sq = g.node("Mul", [diff, diff], "sq_error")
    g.node("ReduceMean", [sq, time_axis], OUTPUTS[1], keepdims=0)

    graph = helper.make_graph(
        g.nodes,
        "ganlet_reconstruction",
        [helper.make_tensor_value_info(INPUT, TensorProto.FLOAT, ["batch", "time", n_channels])],
        [
            helper.make_tensor_value_info(OUTPUTS[0], TensorProto.FLOAT,
                                          ["batch", "time", n_channels]),
            helper.make_tensor_value_info(OUTPUTS[1], TensorProto.FLOAT, ["batch", n_channels]),
        ],
        initializer=g.inits,
    )
    opsets = [helper.make_opsetid("", opset)]
    model = helper.make_model(
        graph,
        opset_imports=opsets,
        producer_name="ganlet",
        # Lowest IR version that carries this opset: older onnxruntime builds on gateways load it.
        ir_version=helper.find_min_ir_version_for(opsets),
        doc_string="ganlet encoder->generator reconstruction; residuals = mean over time of "
                   "squared error per channel",
    )
    helper.set_model_props(model, {"ganlet.weights": "int8" if quantised else "float32"})
    return model


def save_onnx(model: onnx.ModelProto, path: Union[str, os.PathLike]) -> None:
    """Check the model fully (types and shapes too), then write it."""
    onnx.checker.check_model(model, full_check=True)
    onnx.save_model(model, os.fspath(path))


def _as_windows(windows: np.ndarray) -> np.ndarray:
    windows = np.ascontiguousarray(windows, dtype=np.float32)
    if windows.ndim != 3:
        raise ValueError(f"windows must be [N, L, C], got shape {windows.shape}")
    return windows


def run_onnxruntime(
    path_or_model: Union[str, os.PathLike, onnx.ModelProto], windows: np.ndarray
) -> Tuple[np.ndarray, np.ndarray]:
    """(reconstruction, residuals) from onnxruntime, CPU provider, one thread (reproducible)."""
    import onnxruntime as ort

    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    source = (path_or_model.SerializeToString() if isinstance(path_or_model, onnx.ModelProto)
              else os.fspath(path_or_model))
    session = ort.InferenceSession(source, opts, providers=["CPUExecutionProvider"])
    recon, residuals = session.run(list(OUTPUTS), {INPUT: _as_windows(windows)})
    return recon, residuals


def run_reference(
    model: Union[str, os.PathLike, onnx.ModelProto], windows: np.ndarray
) -> Tuple[np.ndarray, np.ndarray]:
    """(reconstruction, residuals) from onnx.reference.ReferenceEvaluator (the spec in numpy)."""
    from onnx.reference import ReferenceEvaluator

    if not isinstance(model, onnx.ModelProto):
        model = onnx.load_model(os.fspath(model))
    recon, residuals = ReferenceEvaluator(model).run(list(OUTPUTS), {INPUT: _as_windows(windows)})
    return recon, residuals
