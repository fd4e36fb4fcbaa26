"""Hand-built ONNX model vs torch, onnxruntime and onnx.reference on a tiny E -> G network."""

import numpy as np
import onnx
import pytest
import torch

from ganlet.compile.export import build_onnx, run_onnxruntime, run_reference, save_onnx
from ganlet.compile.layout import network_weights
from ganlet.compile.quantise import dequantise_weights, quantise_weights

C, LATENT = 3, 4
ENC, GEN = [8, 6], [6, 8]
ATOL = 1e-5


def _stack(sizes, n_in):
    layers, width = [], n_in
    for h in sizes:
        layers.append(torch.nn.LSTM(width, h, batch_first=True))
        width = h
    return torch.nn.ModuleList(layers)


class TinyNet(torch.nn.Module):
    """Teacher-like E -> G: stacked LSTMs with per-step linear heads (DEVELOPERS.md contract)."""

    def __init__(self):
        super().__init__()
        self.enc = _stack(ENC, C)
        self.enc_head = torch.nn.Linear(ENC[-1], LATENT)
        self.gen = _stack(GEN, LATENT)
        self.gen_head = torch.nn.Linear(GEN[-1], C)

    def forward(self, x):
        h = x
        for lstm in self.enc:
            h, _ = lstm(h)
        h = self.enc_head(h)
        for lstm in self.gen:
            h, _ = lstm(h)
        return self.gen_head(h)


@pytest.fixture(scope="module")
def net():
    torch.manual_seed(0)
    return TinyNet().eval()


def _torch_outputs(model, windows):
    with torch.no_grad():
        x = torch.from_numpy(windows)
        r = model(x)
        return r.numpy(), ((x - r) ** 2).mean(dim=1).numpy()


def _windows(n, length, seed=0):
    return np.random.default_rng(seed).standard_normal((n, length, C)).astype(np.float32)


def _load_onnx_layout_into_torch(model, weights):
    """Inverse of the layout, written independently: ONNX gates i, o, f, c -> torch i, f, g, o."""
    def to_torch(a, hidden):
        i, o, f, c = (a[k * hidden:(k + 1) * hidden] for k in range(4))
        return torch.from_numpy(np.concatenate([i, f, c, o]).copy())

    with torch.no_grad():
        for net, stack, head in (("enc", model.enc, model.enc_head),
                                 ("gen", model.gen, model.gen_head)):
            for k, lstm in enumerate(stack):
                h = lstm.hidden_size
                b = weights[f"{net}.lstm{k}.B"][0]
                lstm.weight_ih_l0.copy_(to_torch(weights[f"{net}.lstm{k}.W"][0], h))
                lstm.weight_hh_l0.copy_(to_torch(weights[f"{net}.lstm{k}.R"][0], h))
                lstm.bias_ih_l0.copy_(to_torch(b[:4 * h], h))
                lstm.bias_hh_l0.copy_(to_torch(b[4 * h:], h))
            head.weight.copy_(torch.from_numpy(weights[f"{net}.head.W"]))
            head.bias.copy_(torch.from_numpy(weights[f"{net}.head.b"]))


def test_layout_keys_and_shapes(net):
    w = network_weights(net.enc, net.enc_head, net.gen, net.gen_head)
    assert all(v.dtype == np.float32 for v in w.values())
    # shapes from the ONNX LSTM operator spec: W [1, 4H, I], R [1, 4H, H], B [1, 8H]
    assert w["enc.lstm0.W"].shape == (1, 32, C) and w["enc.lstm1.W"].shape == (1, 24, 8)
    assert w["enc.lstm1.R"].shape == (1, 24, 6) and w["enc.lstm1.B"].shape == (1, 48)
    assert w["enc.head.W"].shape == (LATENT, 6) and w["gen.head.W"].shape == (C, 8)
    # reference: torch.nn.LSTM docs, weight_ih_l0 = (W_ii|W_if|W_ig|W_io); ONNX order is i, o, f, c
    h = 8
    w_ih = net.enc[0].weight_ih_l0.detach().numpy()
    np.testing.assert_array_equal(w["enc.lstm0.W"][0, h:2 * h], w_ih[3 * h:4 * h])  # o
    np.testing.assert_array_equal(w["enc.lstm0.W"][0, 2 * h:3 * h], w_ih[h:2 * h])  # f
    np.testing.assert_array_equal(w["enc.lstm0.W"][0, 3 * h:], w_ih[2 * h:3 * h])  # c = g


def test_fp32_model_matches_torch(net, tmp_path):
    weights = network_weights(net.enc, net.enc_head, net.gen, net.gen_head)
    model = build_onnx(weights, C, quantised=False)
    path = tmp_path / "model.onnx"
    save_onnx(model, path)
    # reference: onnx.checker (full_check: types and shapes)
    onnx.checker.check_model(onnx.load_model(path), full_check=True)
    windows = _windows(5, 7)
    t_rec, t_res = _torch_outputs(net, windows)
    o_rec, o_res = run_onnxruntime(path, windows)
    r_rec, r_res = run_reference(model, windows)
    assert o_rec.shape == (5, 7, C) and o_res.shape == (5, C)
    # reference: torch.nn.LSTM / torch.nn.Linear forward
    # reference: onnxruntime CPUExecutionProvider
    np.testing.assert_allclose(o_rec, t_rec, atol=ATOL)
    np.testing.assert_allclose(o_res, t_res, atol=ATOL)
    # reference: onnx.reference.ReferenceEvaluator
    np.testing.assert_allclose(r_rec, t_rec, atol=ATOL)
    np.testing.assert_allclose(r_res, t_res, atol=ATOL)
    # residuals are mean over time of squared error per channel (DEVELOPERS.md), from numpy
    np.testing.assert_allclose(o_res, ((windows - o_rec) ** 2).mean(axis=1), atol=1e-6)


@pytest.fixture(scope="module")
def quantised_model(net, tmp_path_factory):
    weights = network_weights(net.enc, net.enc_head, net.gen, net.gen_head)
    q = quantise_weights(weights)
    model = build_onnx(q, C, quantised=True)
    path = tmp_path_factory.mktemp("q") / "model.onnx"
    save_onnx(model, path)
    return q, model, path


def test_quantised_model_matches_dequantised_torch(quantised_model):
    q, model, path = quantised_model
    inits = {i.name: i for i in model.graph.initializer}
    assert inits["enc.lstm0.W"].data_type == onnx.TensorProto.INT8
    assert inits["gen.head.W"].data_type == onnx.TensorProto.INT8
    assert inits["gen.head.W.scale"].data_type == onnx.TensorProto.FLOAT
    # 2 matrices per LSTM layer + 2 heads, each behind one DequantizeLinear
    dq = [n for n in model.graph.node if n.op_type == "DequantizeLinear"]
    assert len(dq) == 2 * (len(ENC) + len(GEN)) + 2
    # the initializers are the weights.npz numbers, unchanged
    np.testing.assert_array_equal(onnx.numpy_helper.to_array(inits["enc.lstm1.R"]), q["enc.lstm1.R"])

    torch.manual_seed(1)
    deq_net = TinyNet().eval()
    _load_onnx_layout_into_torch(deq_net, dequantise_weights(q))
    windows = _windows(5, 9, seed=1)
    t_rec, t_res = _torch_outputs(deq_net, windows)
    o_rec, o_res = run_onnxruntime(path, windows)
    r_rec, r_res = run_reference(path, windows)
    # reference: onnxruntime vs onnx.reference.ReferenceEvaluator on the same int8 graph
    np.testing.assert_allclose(o_rec, r_rec, atol=ATOL)
    np.testing.assert_allclose(o_res, r_res, atol=ATOL)
    # reference: torch.nn.LSTM forward with the dequantised weights loaded back
    np.testing.assert_allclose(o_rec, t_rec, atol=ATOL)
    np.testing.assert_allclose(o_res, t_res, atol=ATOL)
    np.testing.assert_allclose(r_rec, t_rec, atol=ATOL)


@pytest.mark.parametrize("n,length", [(1, 4), (5, 4), (1, 11), (5, 11)])
def test_dynamic_batch_and_time(net, quantised_model, n, length):
    _, model, path = quantised_model
    windows = _windows(n, length, seed=n * 100 + length)
    o_rec, o_res = run_onnxruntime(path, windows)
    r_rec, r_res = run_reference(model, windows)
    assert o_rec.shape == (n, length, C) and o_res.shape == (n, C)
    # reference: onnx.reference.ReferenceEvaluator
    np.testing.assert_allclose(o_rec, r_rec, atol=ATOL)
    np.testing.assert_allclose(o_res, r_res, atol=ATOL)
    # each window is scored on its own: batch row 0 equals running it alone (onnxruntime)
    alone_rec, _ = run_onnxruntime(path, windows[:1])
    np.testing.assert_allclose(o_rec[:1], alone_rec, atol=1e-6)


def test_input_checks(net):
    weights = network_weights(net.enc, net.enc_head, net.gen, net.gen_head)
    with pytest.raises(ValueError, match="quantise_weights"):
        build_onnx(weights, C, quantised=True)
    with pytest.raises(ValueError, match="int8"):
        build_onnx(quantise_weights(weights), C, quantised=False)
    with pytest.raises(ValueError):
        build_onnx(weights, C + 1, quantised=False)
