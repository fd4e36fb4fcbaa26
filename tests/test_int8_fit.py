"""Quantisation-aware fine-tuning (compile/int8_fit.py) and the dict -> torch inverse it uses
(compile/layout.py stacks_from_weights).

References: PyTorch's own nn.LSTM / nn.Linear (the modules rebuilt from the dict must compute
what the dict's source modules compute), quantise.py's rounding (itself checked against the
ONNX QuantizeLinear / DequantizeLinear reference in tests/test_quantise.py), and the gateway's
numpy network (runtime/lstm.py) for what the device computes.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from synthetic import correlated_series

from ganlet.compile.data import IntakeOptions, load_frame, split_spans
from ganlet.compile.int8_fit import Int8FitConfig, fake_int8, fit_int8
from ganlet.compile.layout import network_weights, stacks_from_weights
from ganlet.compile.model import LSTMStack, TeacherConfig
from ganlet.compile.quantise import dequantise_weights, quantise_weights
from ganlet.compile.student_cache import own_weights
from ganlet.compile.train import train

TINY = TeacherConfig(window=16, adversarial_epochs=2, inversion_epochs=5, encoder_hidden=(16,),
                     generator_hidden=(8, 16), discriminator_hidden=8, max_train_windows=400)


@pytest.fixture(scope="module")
def model(tmp_path_factory, one_torch_thread):
    csv = tmp_path_factory.mktemp("int8") / "data.csv"
    correlated_series(1500).to_csv(csv, index=False)
    frame = load_frame(csv, IntakeOptions())
    return train(frame, split_spans(frame, None, 0.2), TINY)


def test_the_dict_comes_back_as_the_torch_modules_it_was_taken_from():
    torch.manual_seed(3)
    enc, gen = LSTMStack(4, (16, 8), 2), LSTMStack(2, (8, 16), 4)
    weights = network_weights(enc.layers, enc.head, gen.layers, gen.head)
    enc2, gen2 = stacks_from_weights(weights)
    again = network_weights(enc2.layers, enc2.head, gen2.layers, gen2.head)
    assert set(again) == set(weights)
    assert all(np.array_equal(again[k], weights[k]) for k in weights)
    x = torch.randn(5, 12, 4)
    with torch.no_grad():  # reference: PyTorch's modules on the same input, bit for bit
        assert torch.equal(gen2(enc2(x)), gen(enc(x)))


def test_fake_rounding_is_the_shipped_rounding_and_passes_the_gradient_through():
    rng = np.random.default_rng(0)
    w = rng.standard_normal((6, 9)).astype(np.float32)
    w[2] = 0.0                                    # a zero row: unit scale, zeros either way
    w[3] = 0.0                                    # scale 2^-7 exactly, two ties at .5 steps
    w[3, :3] = [127 / 128, 2.5 / 128, -3.5 / 128]  # half to even: 2 and -4
    shipped = dequantise_weights(quantise_weights({"x.head.W": w}))["x.head.W"]
    t = torch.from_numpy(w).requires_grad_()
    rounded = fake_int8(t)
    assert np.array_equal(rounded.detach().numpy(), shipped)
    g = torch.from_numpy(rng.standard_normal(w.shape).astype(np.float32))
    (rounded * g).sum().backward()
    assert torch.equal(t.grad, g)                 # straight-through: the identity


def test_the_fit_brings_the_int8_network_closer_to_fp32_than_plain_rounding(model):
    fp32 = own_weights(model, "t").fp32
    fit = fit_int8(model, fp32, Int8FitConfig(epochs=4))
    assert fit.kept and fit.weights is not fp32
    assert fit.error_fitted < fit.error_plain / 3
    print(f"\nint8 fit on the tiny teacher: error {fit.error_plain:.3g} -> "
          f"{fit.error_fitted:.3g} (normal-error units, calibration windows)")


def test_a_fit_that_is_no_closer_is_not_shipped_and_zero_epochs_is_plain_rounding(model):
    fp32 = own_weights(model, "t").fp32
    wild = fit_int8(model, fp32, Int8FitConfig(epochs=1, lr=0.5))  # a step that wrecks it
    assert not wild.kept and wild.weights is fp32
    assert wild.error_fitted > wild.error_plain
    plain = fit_int8(model, fp32, Int8FitConfig(epochs=0))
    assert plain.weights is fp32 and not plain.kept
    assert plain.error_fitted == plain.error_plain == wild.error_plain
