"""The numpy LSTM scorer against outside references: torch.nn.LSTM, the ONNX reference
evaluator, onnxruntime and a worked example from the ONNX LSTM operator's equations."""

import ast
import math
from pathlib import Path

import numpy as np
import onnx
import pytest
import torch
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from ganlet.runtime.lstm import Network, lstm_forward
from ganlet.runtime.score import ScoreRule, score_section
from ganlet.runtime.weights import dequantise, load_weights

RUNTIME = Path(__file__).resolve().parents[1] / "runtime"


def torch_to_onnx_layout(lstm: torch.nn.LSTM, layer: int):
    """torch weight_ih/weight_hh/bias_ih/bias_hh (gate order i, f, g, o) -> ONNX W, R, B
    (gate order i, o, f, c). reference: torch.nn.LSTM docs (weight layout) and the ONNX LSTM
    operator spec (W [1, 4H, I], R [1, 4H, H], B [1, 8H] = [Wb, Rb])."""
    hid = lstm.hidden_size
    order = np.concatenate([np.arange(k * hid, (k + 1) * hid) for k in (0, 3, 1, 2)])
    w_ih = getattr(lstm, f"weight_ih_l{layer}").detach().numpy()[order]
    w_hh = getattr(lstm, f"weight_hh_l{layer}").detach().numpy()[order]
    b_ih = getattr(lstm, f"bias_ih_l{layer}").detach().numpy()[order]
    b_hh = getattr(lstm, f"bias_hh_l{layer}").detach().numpy()[order]
    return (
        w_ih[None].astype(np.float32),
        w_hh[None].astype(np.float32),
        np.concatenate([b_ih, b_hh])[None].astype(np.float32),
    )


@pytest.mark.parametrize("num_layers", [1, 2])
def test_lstm_forward_matches_torch(num_layers):
    torch.manual_seed(0)
    t_len, n, i_size, hid = 9, 4, 3, 5
    lstm = torch.nn.LSTM(i_size, hid, num_layers=num_layers)
    x = torch.randn(t_len, n, i_size)
    h0 = torch.randn(num_layers, n, hid)
    c0 = torch.randn(num_layers, n, hid)
    with torch.no_grad():
        y_ref, (h_ref, c_ref) = lstm(x, (h0, c0))

    seq = x.numpy()
    for k in range(num_layers):
        W, R, B = torch_to_onnx_layout(lstm, k)
        seq, h_last, c_last = lstm_forward(seq, W, R, B, h0[k].numpy(), c0[k].numpy())
        assert seq.dtype == np.float32
        # reference: torch.nn.LSTM final states per layer
        np.testing.assert_allclose(h_last, h_ref[k].numpy(), atol=1e-5)
        np.testing.assert_allclose(c_last, c_ref[k].numpy(), atol=1e-5)
    # reference: torch.nn.LSTM output sequence of the top layer
    np.testing.assert_allclose(seq, y_ref.numpy(), atol=1e-5)


def onnx_lstm_model(hid: int, with_states: bool) -> onnx.ModelProto:
    """One-node graph: the ONNX LSTM operator, forward, default activations (opset 20)."""
    inputs = (
        ["X", "W", "R", "B", "", "initial_h", "initial_c"] if with_states else ["X", "W", "R", "B"]
    )
    node = helper.make_node("LSTM", inputs, ["Y", "Y_h", "Y_c"], hidden_size=hid)
    f = TensorProto.FLOAT
    ins = [helper.make_tensor_value_info(k, f, None) for k in inputs if k]
    outs = [helper.make_tensor_value_info(k, f, None) for k in ("Y", "Y_h", "Y_c")]
    graph = helper.make_graph([node], "lstm", ins, outs)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 20)])


@pytest.mark.parametrize("with_states", [False, True])
def test_lstm_forward_matches_onnx_reference(with_states):
    rng = np.random.default_rng(1)
    t_len, n, i_size, hid = 7, 3, 4, 6
    x = rng.normal(size=(t_len, n, i_size)).astype(np.float32)
    W = (0.5 * rng.normal(size=(1, 4 * hid, i_size))).astype(np.float32)
    R = (0.5 * rng.normal(size=(1, 4 * hid, hid))).astype(np.float32)
    B = (0.3 * rng.normal(size=(1, 8 * hid))).astype(np.float32)
    feeds = {"X": x, "W": W, "R": R, "B": B}
    h0 = c0 = None
    if with_states:
        h0 = rng.normal(size=(1, n, hid)).astype(np.float32)
        c0 = rng.normal(size=(1, n, hid)).astype(np.float32)
        feeds.update(initial_h=h0, initial_c=c0)
    y_ref, yh_ref, yc_ref = ReferenceEvaluator(onnx_lstm_model(hid, with_states)).run(None, feeds)

    y, h_last, c_last = lstm_forward(x, W, R, B, h0, c0)
    # reference: onnx.reference.ReferenceEvaluator, LSTM operator (Y is [T, 1, N, H])
    np.testing.assert_allclose(y, y_ref[:, 0], atol=1e-5)
    np.testing.assert_allclose(h_last, yh_ref[0], atol=1e-5)
    np.testing.assert_allclose(c_last, yc_ref[0], atol=1e-5)


def test_one_step_worked_example():
    # Worked example computed by hand from the ONNX LSTM spec's equations (default activations,
    # no peepholes), T = N = H = I = 1, gate order i, o, f, c:
    #   x = 1, H0 = 0.5, C0 = ln(3) - 0.5
    #   i  = sigmoid(1*1 + (-2)*0.5 + 0 + 0)          = sigmoid(0) = 0.5
    #   o  = sigmoid(0.5*1 + 1*0.5 - 0.5 - 0.5)       = sigmoid(0) = 0.5
    #   f  = sigmoid(2*1 + (-4)*0.5 + 0 + 0)          = sigmoid(0) = 0.5
    #   c~ = tanh(0*1 + 0*0.5 + ln(3)/2 + 0)          = (3 - 1) / (3 + 1) = 0.5
    #   C1 = f*C0 + i*c~ = 0.5*(ln 3 - 0.5) + 0.25    = ln(3)/2
    #   H1 = o * tanh(C1) = 0.5 * 0.5                  = 0.25
    W = np.array([[[1.0], [0.5], [2.0], [0.0]]], dtype=np.float32)
    R = np.array([[[-2.0], [1.0], [-4.0], [0.0]]], dtype=np.float32)
    B = np.array([[0.0, -0.5, 0.0, math.log(3) / 2, 0.0, -0.5, 0.0, 0.0]], dtype=np.float32)
    x = np.ones((1, 1, 1), dtype=np.float32)
    h0 = np.full((1, 1), 0.5, dtype=np.float32)
    c0 = np.full((1, 1), math.log(3) - 0.5, dtype=np.float32)
    y, h_last, c_last = lstm_forward(x, W, R, B, h0, c0)
    assert y.shape == (1, 1, 1)
    assert y[0, 0, 0] == pytest.approx(0.25, abs=1e-6)
    assert h_last[0, 0] == pytest.approx(0.25, abs=1e-6)
    assert c_last[0, 0] == pytest.approx(math.log(3) / 2, abs=1e-6)


def test_saturated_gates_are_stable_and_float32():
    """The gates' logistic function, at inputs far into saturation: no overflow anywhere and
    the float32 result of the operator's equations."""
    from scipy.special import expit

    x = np.array([-1000.0, -80.0, -20.0, -1.0, 0.0, 1.0, 20.0, 80.0, 1000.0], dtype=np.float32)
    t_len, hid = len(x), 1
    # one unit, input weight 1 on every gate, no recurrence: gates = x_t exactly
    W = np.ones((1, 4 * hid, 1), dtype=np.float32)
    R = np.zeros((1, 4 * hid, hid), dtype=np.float32)
    with np.errstate(over="raise", invalid="raise", divide="raise"):  # no overflow anywhere
        y, _, c_last = lstm_forward(x.reshape(t_len, 1, 1), W, R)
    assert y.dtype == np.float32
    # reference: the ONNX LSTM equations in float64 with scipy.special.expit as f
    c = 0.0
    ref = []
    for v in x.astype(np.float64):
        c = expit(v) * c + expit(v) * np.tanh(v)
        ref.append(expit(v) * np.tanh(c))
    # the gates use logistic(x) = (1 + tanh(x / 2)) / 2 (runtime/lstm.py): exact to float32
    # rounding in absolute terms (~6e-8), not in relative terms near 0
    np.testing.assert_allclose(y[:, 0, 0], ref, rtol=1e-6, atol=1e-7)


# ---------------------------------------------------------------- the network


def random_weights(rng, c=3, enc=(6, 5), k=2, gen=(4, 7)):
    """A float32 ONNX-layout weight dict as in DEVELOPERS.md."""
    w = {}
    for net, sizes, n_in, n_out in (("enc", enc, c, k), ("gen", gen, k, c)):
        prev = n_in
        for j, hid in enumerate(sizes):
            w[f"{net}.lstm{j}.W"] = (0.5 * rng.normal(size=(1, 4 * hid, prev))).astype(np.float32)
            w[f"{net}.lstm{j}.R"] = (0.5 * rng.normal(size=(1, 4 * hid, hid))).astype(np.float32)
            w[f"{net}.lstm{j}.B"] = (0.2 * rng.normal(size=(1, 8 * hid))).astype(np.float32)
            prev = hid
        w[f"{net}.head.W"] = rng.normal(size=(n_out, prev)).astype(np.float32)
        w[f"{net}.head.b"] = (0.1 * rng.normal(size=(n_out,))).astype(np.float32)
    return w


def onnx_network(w) -> onnx.ModelProto:
    """Hand-built ONNX graph of encoder + generator: [N, L, C] -> reconstruction [N, L, C]."""
    nodes, inits = [], []
    for key, val in w.items():
        if key.endswith("head.W"):
            inits.append(numpy_helper.from_array(np.ascontiguousarray(val.T), key + "T"))
        else:
            inits.append(numpy_helper.from_array(val, key))
    inits.append(numpy_helper.from_array(np.array([1], dtype=np.int64), "axis1"))
    nodes.append(helper.make_node("Transpose", ["x"], ["seq_in"], perm=[1, 0, 2]))
    cur = "seq_in"
    for net in ("enc", "gen"):
        j = 0
        while f"{net}.lstm{j}.W" in w:
            pre = f"{net}.lstm{j}"
            hid = w[f"{pre}.R"].shape[2]
            nodes.append(
                helper.make_node(
                    "LSTM", [cur, f"{pre}.W", f"{pre}.R", f"{pre}.B"], [pre + ".Y"], hidden_size=hid
                )
            )
            nodes.append(helper.make_node("Squeeze", [pre + ".Y", "axis1"], [pre + ".out"]))
            cur = pre + ".out"
            j += 1
        nodes.append(helper.make_node("MatMul", [cur, f"{net}.head.WT"], [net + ".mm"]))
        nodes.append(helper.make_node("Add", [net + ".mm", f"{net}.head.b"], [net + ".z"]))
        cur = net + ".z"
    nodes.append(helper.make_node("Transpose", [cur], ["recon"], perm=[1, 0, 2]))
    f = TensorProto.FLOAT
    graph = helper.make_graph(
        nodes,
        "ganlet_net",
        [helper.make_tensor_value_info("x", f, ["N", "L", w["enc.lstm0.W"].shape[2]])],
        [helper.make_tensor_value_info("recon", f, ["N", "L", w["gen.head.W"].shape[0]])],
        inits,
    )
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 20)])


def test_network_matches_onnx_graph():
    rng = np.random.default_rng(2)
    w = random_weights(rng)
    net = Network(w)
    x = rng.normal(size=(4, 12, 3)).astype(np.float32)
    recon = net.reconstruct(x)
    model = onnx_network(w)
    onnx.checker.check_model(model)
    (ref,) = ReferenceEvaluator(model).run(None, {"x": x})
    # reference: onnx.reference.ReferenceEvaluator on the hand-built encoder+generator graph
    np.testing.assert_allclose(recon, ref, atol=1e-5)

    ort = pytest.importorskip("onnxruntime")
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    (ort_out,) = sess.run(None, {"x": x})
    # reference: onnxruntime CPUExecutionProvider on the same graph
    np.testing.assert_allclose(recon, ort_out, atol=1e-5)


def test_network_shapes_residuals_and_score():
    rng = np.random.default_rng(3)
    w = random_weights(rng)
    net = Network(w)
    assert net.encoder_sizes == [6, 5] and net.generator_sizes == [4, 7]
    assert net.n_channels == 3 and net.latent == 2
    x = rng.normal(size=(5, 10, 3)).astype(np.float32)
    z = net.encode(x)
    assert z.shape == (5, 10, 2) and z.dtype == np.float32
    recon, res = net.forward(x)
    assert recon.shape == x.shape and recon.dtype == np.float32
    assert res.shape == (5, 3) and res.dtype == np.float32
    # reference: the score definition in DEVELOPERS.md, written out in float64 numpy
    expect_res = ((x.astype(np.float64) - recon) ** 2).mean(axis=1)
    np.testing.assert_allclose(res, expect_res, rtol=1e-5)
    scores, _ = ScoreRule(score_section()).apply(res)
    np.testing.assert_allclose(scores, expect_res.mean(axis=1), rtol=1e-5)
    # window length is free: a different L works with the same weights, and windows are
    # scored independently (one window alone gives the same numbers as in the batch)
    r7 = net.reconstruct(x[:, :7])
    assert r7.shape == (5, 7, 3)
    np.testing.assert_allclose(net.reconstruct(x[2:3]), recon[2:3], atol=1e-6)


def test_offset_statistic_against_pandas_and_its_white_noise_expectation():
    """score.statistic "mse+offset" (runtime/score.py): per channel, the newest k steps' mean
    squared error plus k times their mean error squared. Reference: pandas' population variance
    and mean (mean e^2 = var + mean^2, so the statistic is var + (k + 1) mean^2)."""
    import pandas as pd

    rng = np.random.default_rng(7)
    x = rng.normal(size=(4, 12, 3)).astype(np.float32)
    r = (x + rng.normal(0.3, 0.5, size=x.shape)).astype(np.float32)
    k = 5
    rule = ScoreRule(score_section(steps=k, statistic="mse+offset"))
    got = rule.residuals(x, r)
    for n in range(4):
        e = pd.DataFrame((x[n, -k:] - r[n, -k:]).astype(np.float64))
        np.testing.assert_allclose(got[n], e.var(ddof=0) + (k + 1) * e.mean() ** 2, rtol=1e-5)
    # white error of variance s^2: both terms have expectation s^2 (the noise counts twice)
    s, k = 0.5, 8
    e = rng.normal(0.0, s, size=(20000, k, 1)).astype(np.float32)
    zero = np.zeros_like(e)
    plain = ScoreRule(score_section(steps=k)).residuals(e, zero)
    both = ScoreRule(score_section(steps=k, statistic="mse+offset")).residuals(e, zero)
    assert abs(plain.mean() / s**2 - 1) < 0.03 and abs(both.mean() / (2 * s**2) - 1) < 0.03
    # a held offset b counts (k + 1) b^2, against b^2 without the offset term
    held = np.full((1, k, 1), 0.25, np.float32)
    np.testing.assert_allclose(ScoreRule(score_section(steps=k, statistic="mse+offset"))
                               .residuals(held, np.zeros_like(held)), [[(k + 1) * 0.0625]],
                               rtol=1e-6)


def test_a_score_section_without_a_statistic_is_the_mse_of_older_bundles():
    section = score_section(steps=4)
    assert "statistic" not in section and ScoreRule(section).statistic == "mse"
    with pytest.raises(ValueError, match="mse, mse\\+offset"):
        ScoreRule({**section, "statistic": "median"})


def test_network_flops_estimate():
    w = random_weights(np.random.default_rng(4))
    net = Network(w)
    # worked by hand: enc 4*6*(3+6) + 4*5*(6+5) + 2*5, gen 4*4*(2+4) + 4*7*(4+7) + 3*7 MACs/step
    macs = 216 + 220 + 10 + 96 + 308 + 21
    assert net.flops_per_window(16) == 2 * macs * 16


def test_network_rejects_bad_weights():
    w = random_weights(np.random.default_rng(5))
    bad = dict(w)
    del bad["gen.head.b"]
    with pytest.raises(ValueError, match="gen.head.b"):
        Network(bad)
    bad = dict(w)
    bad["enc.lstm0.W.scale"] = np.ones(24, dtype=np.float32)
    with pytest.raises(ValueError, match="unexpected weight keys"):
        Network(bad)
    bad = dict(w)
    bad["enc.lstm1.W"] = bad["enc.lstm1.W"][:, :, :4]
    with pytest.raises(ValueError, match="input size"):
        Network(bad)
    with pytest.raises(ValueError, match=r"\[N, L, 3\]"):
        Network(w).forward(np.zeros((2, 5, 4), dtype=np.float32))


def test_runtime_files_are_python39_and_numpy_only():
    for name in ("lstm.py", "weights.py", "thresholds.py", "alerts.py"):
        src = (RUNTIME / name).read_text()
        tree = ast.parse(src, feature_version=(3, 9))  # reference: CPython ast, 3.9 grammar
        mods = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                mods.update(a.name.split(".")[0] for a in node.names)
            elif isinstance(node, ast.ImportFrom) and node.module:
                mods.add(node.module.split(".")[0])
        assert mods <= {"numpy", "math", "typing", "collections", "os", "numbers", "json"}, (
            name,
            mods,
        )


# ---------------------------------------------------------------- weights.npz


def dequantize_linear_reference(q, scale, axis):
    """One-node ONNX graph: DequantizeLinear (opset 20), per-axis scales, int8 zero point 0."""
    zp = np.zeros(scale.shape, dtype=np.int8)
    node = helper.make_node("DequantizeLinear", ["q", "s", "zp"], ["y"], axis=axis)
    graph = helper.make_graph(
        [node],
        "dq",
        [
            helper.make_tensor_value_info("q", TensorProto.INT8, list(q.shape)),
            helper.make_tensor_value_info("s", TensorProto.FLOAT, list(scale.shape)),
            helper.make_tensor_value_info("zp", TensorProto.INT8, list(scale.shape)),
        ],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, list(q.shape))],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 20)])
    return ReferenceEvaluator(model).run(None, {"q": q, "s": scale, "zp": zp})[0]


@pytest.mark.parametrize("shape,axis", [((1, 12, 5), 1), ((4, 7), 0)])
def test_dequantise_matches_onnx_dequantize_linear(shape, axis):
    rng = np.random.default_rng(6)
    q = rng.integers(-128, 128, size=shape).astype(np.int8)
    scale = rng.uniform(1e-3, 0.1, size=shape[axis]).astype(np.float32)
    got = dequantise(q, scale, axis)
    assert got.dtype == np.float32
    # reference: onnx.reference DequantizeLinear with per-axis scales (bit-exact float32 product)
    np.testing.assert_array_equal(got, dequantize_linear_reference(q, scale, axis))
    with pytest.raises(ValueError, match="int8"):
        dequantise(q.astype(np.int16), scale, axis)
    with pytest.raises(ValueError, match="scales for"):
        dequantise(q, scale[:-1], axis)


def test_load_weights_round_trip(tmp_path):
    rng = np.random.default_rng(8)
    w = random_weights(rng)
    stored = {}
    for key, val in w.items():
        if key.endswith(".B") or key.endswith(".b"):
            stored[key] = val
            continue
        axis = 0 if key.endswith("head.W") else 1
        other = tuple(a for a in range(val.ndim) if a != axis)
        scale = (np.abs(val).max(axis=other) / 127).astype(np.float32)
        shape = [1] * val.ndim
        shape[axis] = -1
        stored[key] = np.clip(np.rint(val / scale.reshape(shape)), -127, 127).astype(np.int8)
        stored[key + ".scale"] = scale
    path = tmp_path / "weights.npz"
    np.savez(path, **stored)
    loaded = load_weights(path)
    assert sorted(loaded) == sorted(w)  # companions are not returned
    for key, val in loaded.items():
        assert val.dtype == np.float32 and val.shape == w[key].shape
        if key + ".scale" in stored:
            axis = 0 if key.endswith("head.W") else 1
            # reference: onnx.reference DequantizeLinear on the stored int8 + scale
            ref = dequantize_linear_reference(stored[key], stored[key + ".scale"], axis)
            np.testing.assert_array_equal(val, ref)
            # and the dequantised matrix is within half a step of the float original
            step = stored[key + ".scale"].max()
            assert np.abs(val - w[key]).max() <= 0.5 * step + 1e-7
        else:
            np.testing.assert_array_equal(val, stored[key])
    # the dequantised dict drives the network directly
    net = Network(loaded)
    x = rng.normal(size=(2, 6, 3)).astype(np.float32)
    assert np.isfinite(net.forward(x)[1]).all()


def test_load_weights_rejects_malformed(tmp_path):
    p = tmp_path / "orphan.npz"
    np.savez(p, **{"enc.head.W.scale": np.ones(2, dtype=np.float32)})
    with pytest.raises(ValueError, match="no matching matrix"):
        load_weights(p)
    p = tmp_path / "notint8.npz"
    np.savez(p, **{"enc.head.W": np.ones((2, 3)), "enc.head.W.scale": np.ones(2, dtype=np.float32)})
    with pytest.raises(ValueError, match="not int8"):
        load_weights(p)
    p = tmp_path / "pickled.npz"
    np.savez(p, **{"enc.head.b": np.array([{"a": 1}], dtype=object)})
    with pytest.raises(ValueError):  # allow_pickle=False: object arrays are refused
        load_weights(p)
