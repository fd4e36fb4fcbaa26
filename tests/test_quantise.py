"""int8 quantisation checked against the ONNX QuantizeLinear / DequantizeLinear operators."""

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from ganlet.compile.quantise import (
    dequantise_weights,
    dequantize_linear,
    quantisation_report,
    quantise_weights,
    quantize_linear,
    symmetric_scales,
)

OPSET = 20


def _one_node_model(op: str, x: np.ndarray, scale: np.ndarray, axis: int) -> onnx.ModelProto:
    """A single QuantizeLinear or DequantizeLinear node, int8 zero point 0, per-axis scales."""
    x_type = TensorProto.INT8 if op == "DequantizeLinear" else TensorProto.FLOAT
    y_type = TensorProto.FLOAT if op == "DequantizeLinear" else TensorProto.INT8
    inits = [
        numpy_helper.from_array(scale.astype(np.float32), "scale"),
        # An int8 zero point selects int8 output for QuantizeLinear (the default is uint8).
        numpy_helper.from_array(np.zeros(scale.shape, dtype=np.int8), "zero_point"),
    ]
    node = helper.make_node(op, ["x", "scale", "zero_point"], ["y"], axis=axis)
    graph = helper.make_graph(
        [node], "one_node",
        [helper.make_tensor_value_info("x", x_type, list(x.shape))],
        [helper.make_tensor_value_info("y", y_type, list(x.shape))],
        initializer=inits,
    )
    opsets = [helper.make_opsetid("", OPSET)]
    model = helper.make_model(graph, opset_imports=opsets,
                              ir_version=helper.find_min_ir_version_for(opsets))
    onnx.checker.check_model(model, full_check=True)
    return model


def _reference(op, x, scale, axis):
    return ReferenceEvaluator(_one_node_model(op, x, scale, axis)).run(None, {"x": x})[0]


def _onnxruntime(op, x, scale, axis):
    model = _one_node_model(op, x, scale, axis)
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(None, {"x": x})[0]


def _exact_multiples(units) -> tuple:
    """Rows with power-of-two scales so x / scale is exactly `units` in float32 (ties stay ties)."""
    scale = np.array([0.5, 0.25, 2.0, 0.125], dtype=np.float32)
    units = np.asarray(units, dtype=np.float32)
    x = (units[None, :] * scale[:, None]).astype(np.float32)  # exact: scales are powers of two
    return x, scale


TIES = [-3.5, -2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 3.5, 126.5, -127.5, -128.5]
BEYOND = [127.49, 127.5, 128.0, 300.0, -128.49, -129.5, -1000.0]


def _ties_and_saturation() -> tuple:
    return _exact_multiples(TIES + BEYOND)


def test_quantize_linear_ties_and_saturation_match_onnx_reference():
    x, scale = _ties_and_saturation()
    ours = quantize_linear(x, scale, axis=0)
    assert ours.dtype == np.int8
    # reference: onnx.reference QuantizeLinear (opset 20), per-axis, int8 zero point
    expected = _reference("QuantizeLinear", x, scale, axis=0)
    assert expected.dtype == np.int8
    np.testing.assert_array_equal(ours, expected)
    # reference: onnxruntime QuantizeLinear, CPUExecutionProvider
    np.testing.assert_array_equal(ours, _onnxruntime("QuantizeLinear", x, scale, axis=0))
    # worked example, ONNX QuantizeLinear spec: round half to even, saturate to [-128, 127]
    for row in ours.tolist():
        assert row[:8] == [-4, -2, -2, 0, 0, 2, 2, 4]
        assert row[8:11] == [126, -128, -128]  # 126.5 -> 126, -127.5 -> -128, -128.5 -> -128
        assert row[11:] == [127, 127, 127, 127, -128, -128, -128]


def test_quantize_linear_saturates_values_beyond_int32():
    # onnx.reference casts rint(x / scale) to int32 before clipping, so values past the int32
    # range wrap there (1e30 comes out as -128); the operator spec says saturate. onnxruntime
    # saturates, and so do we.
    x, scale = _exact_multiples([1e30, -1e30, 3e9, np.inf, -np.inf])
    ours = quantize_linear(x, scale, axis=0)
    # reference: onnxruntime QuantizeLinear, CPUExecutionProvider
    np.testing.assert_array_equal(ours, _onnxruntime("QuantizeLinear", x, scale, axis=0))
    # reference: ONNX QuantizeLinear spec, "saturate to [-128, 127] for int8"
    assert (ours == np.array([127, -128, 127, 127, -128], dtype=np.int8)).all()
    with pytest.raises(ValueError):
        quantize_linear(np.array([np.nan], np.float32), np.float32(1.0))


def test_quantize_linear_per_axis_lstm_shape_matches_onnx_reference():
    rng = np.random.default_rng(1)
    w = rng.standard_normal((1, 12, 5)).astype(np.float32)  # LSTM W layout [1, 4H, I]
    scale = symmetric_scales(w, axis=1)
    assert scale.shape == (12,) and scale.dtype == np.float32
    ours = quantize_linear(w, scale, axis=1)
    # reference: onnx.reference QuantizeLinear (opset 20), axis=1
    np.testing.assert_array_equal(ours, _reference("QuantizeLinear", w, scale, axis=1))
    # reference: onnxruntime QuantizeLinear, axis=1
    np.testing.assert_array_equal(ours, _onnxruntime("QuantizeLinear", w, scale, axis=1))
    # symmetric: the largest |w| of each row lands on +-127, nothing reaches -128
    assert (np.abs(ours).max(axis=(0, 2)) == 127).all()
    assert ours.min() >= -127


def test_dequantize_linear_matches_onnx_reference_bitwise():
    x, scale = _ties_and_saturation()
    q = quantize_linear(x, scale, axis=0)
    ours = dequantize_linear(q, scale, axis=0)
    assert ours.dtype == np.float32
    # reference: onnx.reference DequantizeLinear (opset 20), per-axis
    expected = _reference("DequantizeLinear", q, scale, axis=0)
    np.testing.assert_array_equal(ours.view(np.uint32), expected.view(np.uint32))
    # reference: onnxruntime DequantizeLinear, CPUExecutionProvider
    np.testing.assert_array_equal(ours, _onnxruntime("DequantizeLinear", q, scale, axis=0))

    rng = np.random.default_rng(2)
    w = rng.standard_normal((7, 4)).astype(np.float32) * 3  # head.W layout [out, in]
    s = symmetric_scales(w, axis=0)
    qw = quantize_linear(w, s, axis=0)
    # reference: onnx.reference DequantizeLinear (opset 20), axis=0
    np.testing.assert_array_equal(dequantize_linear(qw, s, axis=0),
                                  _reference("DequantizeLinear", qw, s, axis=0))


def test_round_trip_error_at_most_half_a_step():
    rng = np.random.default_rng(3)
    w = (rng.standard_normal((1, 16, 6)) * np.linspace(1e-3, 5, 16)[None, :, None]).astype(
        np.float32)
    s = symmetric_scales(w, axis=1)
    back = dequantize_linear(quantize_linear(w, s, axis=1), s, axis=1)
    err = np.abs(w - back)
    # reference: ONNX QuantizeLinear spec, round to nearest => |x - q*s| <= s/2 inside the
    # range; the 1e-6 relative slack covers float32 rounding of x/s and q*s (from memory)
    bound = s[None, :, None] / 2 * (1 + 1e-6)
    assert (err <= bound).all()


def test_zero_row_gets_unit_scale_and_quantises_to_zero():
    w = np.zeros((3, 4), dtype=np.float32)
    w[1] = [0.5, -1.0, 0.25, 0.0]
    s = symmetric_scales(w, axis=0)
    assert s[0] == 1.0 and s[2] == 1.0
    assert s[1] == np.float32(1.0) / np.float32(127)
    q = quantize_linear(w, s, axis=0)
    assert (q[0] == 0).all() and (q[2] == 0).all()
    assert q[1].tolist() == [64, -127, 32, 0]  # 63.5 -> 64 (tie, even), 31.75 -> 32


def test_bad_inputs_are_rejected():
    with pytest.raises(ValueError):
        symmetric_scales(np.array([[1.0, np.nan]], dtype=np.float32), axis=0)
    with pytest.raises(ValueError):
        quantize_linear(np.ones((2, 3), np.float32), np.ones(3, np.float32), axis=0)
    with pytest.raises(ValueError):
        quantize_linear(np.ones((2, 3), np.float32), np.zeros(2, np.float32), axis=0)
    with pytest.raises(ValueError):
        quantise_weights({"enc.something": np.ones(3, np.float32)})


def _contract_dict(rng) -> dict:
    """Float32 weights with the contract's keys and shapes: C=3, enc [5] -> K=2, gen [4]."""
    def f(*shape):
        return rng.standard_normal(shape).astype(np.float32)
    return {
        "enc.lstm0.W": f(1, 20, 3), "enc.lstm0.R": f(1, 20, 5), "enc.lstm0.B": f(1, 40),
        "enc.head.W": f(2, 5), "enc.head.b": f(2),
        "gen.lstm0.W": f(1, 16, 2), "gen.lstm0.R": f(1, 16, 4), "gen.lstm0.B": f(1, 32),
        "gen.head.W": f(3, 4), "gen.head.b": f(3),
    }


def test_quantise_weights_key_conventions_and_npz(tmp_path):
    weights = _contract_dict(np.random.default_rng(4))
    q = quantise_weights(weights)
    matrices = {"enc.lstm0.W": 1, "enc.lstm0.R": 1, "enc.head.W": 0,
                "gen.lstm0.W": 1, "gen.lstm0.R": 1, "gen.head.W": 0}
    biases = ["enc.lstm0.B", "enc.head.b", "gen.lstm0.B", "gen.head.b"]
    assert set(q) == set(weights) | {k + ".scale" for k in matrices}
    for key, axis in matrices.items():
        assert q[key].dtype == np.int8 and q[key].shape == weights[key].shape
        assert q[key + ".scale"].dtype == np.float32
        assert q[key + ".scale"].shape == (weights[key].shape[axis],)
    for key in biases:
        assert q[key].dtype == np.float32
        np.testing.assert_array_equal(q[key], weights[key])

    back = dequantise_weights(q)
    assert set(back) == set(weights)
    for key, axis in matrices.items():
        assert back[key].dtype == np.float32
        # reference: onnx.reference DequantizeLinear with the contract's axis (DEVELOPERS.md)
        np.testing.assert_array_equal(
            back[key], _reference("DequantizeLinear", q[key], q[key + ".scale"], axis=axis))

    path = tmp_path / "weights.npz"
    np.savez(path, **q)
    # reference: numpy.load(allow_pickle=False) — plain arrays only, as the gateway loads them
    with np.load(path, allow_pickle=False) as loaded:
        assert set(loaded.files) == set(q)
        for key in q:
            assert loaded[key].dtype == q[key].dtype
            np.testing.assert_array_equal(loaded[key], q[key])
        reloaded = {k: loaded[k] for k in loaded.files}
    for key in back:
        np.testing.assert_array_equal(dequantise_weights(reloaded)[key], back[key])


def test_quantisation_report():
    weights = _contract_dict(np.random.default_rng(5))
    q = quantise_weights(weights)
    rep = quantisation_report(weights, q)
    assert set(rep["keys"]) == set(weights)
    w = weights["gen.head.W"]
    # reference: numpy, error recomputed from the ONNX DequantizeLinear of the int8 values
    back = _reference("DequantizeLinear", q["gen.head.W"], q["gen.head.W.scale"], axis=0)
    entry = rep["keys"]["gen.head.W"]
    assert entry["max_abs_error"] == pytest.approx(float(np.abs(w - back).max()))
    assert entry["relative_error"] == pytest.approx(entry["max_abs_error"] / np.abs(w).max())
    assert entry["bytes_before"] == w.size * 4
    assert entry["bytes_after"] == w.size + w.shape[0] * 4
    assert rep["keys"]["gen.head.b"]["max_abs_error"] == 0.0
    assert rep["bytes_before"] == sum(v.nbytes for v in weights.values())
    assert rep["bytes_after"] == sum(v.nbytes for v in q.values())
    assert rep["bytes_after"] < rep["bytes_before"]
