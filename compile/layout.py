"""torch modules <-> the flat weight dict of the network contract (ONNX LSTM layout).

The contract (DEVELOPERS.md) stores every LSTM layer as ONNX's W [1, 4H, I], R [1, 4H, H],
B [1, 8H] with gate order i, o, f, c. torch.nn.LSTM keeps weight_ih_l{k} [4H, I] and
weight_hh_l{k} [4H, H] with gate order i, f, g, o (g is ONNX's c), and two bias vectors.
Reordering here, once, means both device backends (numpy and onnxruntime) read the same numbers.
"""

from typing import Dict, Iterable, List, Union

import numpy as np
import torch

from ganlet.compile.model import LSTMStack as TorchStack

# Row blocks of a torch LSTM matrix (i, f, g, o) picked in ONNX order (i, o, f, c=g).
_TORCH_TO_ONNX_GATES = (0, 3, 1, 2)

LSTMStack = Union[torch.nn.LSTM, Iterable[torch.nn.LSTM]]


def _as_array(t: torch.Tensor) -> np.ndarray:
    return t.detach().cpu().numpy().astype(np.float32, copy=True)


def _reorder_gates(a: np.ndarray, hidden: int) -> np.ndarray:
    """Reorder the 4 gate blocks along axis 0 from torch (i, f, g, o) to ONNX (i, o, f, c)."""
    blocks = [a[g * hidden:(g + 1) * hidden] for g in range(4)]
    return np.concatenate([blocks[g] for g in _TORCH_TO_ONNX_GATES], axis=0)


def _as_lstm_list(lstm: LSTMStack) -> List[torch.nn.LSTM]:
    if isinstance(lstm, torch.nn.LSTM):
        return [lstm]
    modules = list(lstm)
    if not modules or not all(isinstance(m, torch.nn.LSTM) for m in modules):
        raise TypeError("expected a torch.nn.LSTM or a non-empty sequence of torch.nn.LSTM")
    return modules


def lstm_to_onnx(lstm: LSTMStack, prefix: str) -> Dict[str, np.ndarray]:
    """One entry set per stacked layer: f"{prefix}.lstm{k}.W/R/B" in ONNX layout.

    `lstm` is one torch.nn.LSTM (num_layers >= 1) or a sequence of them (so stacked layers may
    have different hidden sizes); layers are numbered consecutively across the sequence.
    batch_first does not matter (it only changes how torch reads its input). Dropout between
    layers is a training-time thing and is ignored.
    """
    out: Dict[str, np.ndarray] = {}
    k = 0
    prev_hidden = None
    for module in _as_lstm_list(lstm):
        if module.bidirectional:
            raise ValueError(f"{prefix}: bidirectional LSTMs are not part of the network contract")
        if module.proj_size:
            raise ValueError(f"{prefix}: LSTMs with proj_size are not part of the network contract")
        if prev_hidden is not None and module.input_size != prev_hidden:
            raise ValueError(
                f"{prefix}: stacked LSTM expects input_size {prev_hidden}, got {module.input_size}"
            )
        hidden = module.hidden_size
        for layer in range(module.num_layers):
            w_ih = _as_array(getattr(module, f"weight_ih_l{layer}"))
            w_hh = _as_array(getattr(module, f"weight_hh_l{layer}"))
            if module.bias:
                b_ih = _as_array(getattr(module, f"bias_ih_l{layer}"))
                b_hh = _as_array(getattr(module, f"bias_hh_l{layer}"))
            else:
                # ONNX treats a missing B as zeros; we always write it so the layout is uniform.
                b_ih = np.zeros(4 * hidden, dtype=np.float32)
                b_hh = np.zeros(4 * hidden, dtype=np.float32)
            key = f"{prefix}.lstm{k}"
            out[f"{key}.W"] = _reorder_gates(w_ih, hidden)[None]
            out[f"{key}.R"] = _reorder_gates(w_hh, hidden)[None]
            out[f"{key}.B"] = np.concatenate(
                [_reorder_gates(b_ih, hidden), _reorder_gates(b_hh, hidden)]
            )[None]
            k += 1
        prev_hidden = hidden
    return out


def linear_to_onnx(linear: torch.nn.Linear, prefix: str) -> Dict[str, np.ndarray]:
    """f"{prefix}.head.W" [out, in] (torch's own layout) and f"{prefix}.head.b" [out]."""
    w = _as_array(linear.weight)
    if linear.bias is not None:
        b = _as_array(linear.bias)
    else:
        b = np.zeros(w.shape[0], dtype=np.float32)
    return {f"{prefix}.head.W": w, f"{prefix}.head.b": b}


def network_weights(
    encoder_lstm: LSTMStack,
    encoder_head: torch.nn.Linear,
    generator_lstm: LSTMStack,
    generator_head: torch.nn.Linear,
) -> Dict[str, np.ndarray]:
    """The whole contract dict: "enc.*" (encoder E) and "gen.*" (generator G), float32."""
    weights: Dict[str, np.ndarray] = {}
    weights.update(lstm_to_onnx(encoder_lstm, "enc"))
    weights.update(linear_to_onnx(encoder_head, "enc"))
    weights.update(lstm_to_onnx(generator_lstm, "gen"))
    weights.update(linear_to_onnx(generator_head, "gen"))
    _check_chain(weights)
    return weights


def _check_chain(weights: Dict[str, np.ndarray]) -> None:
    """Fail early if the pieces do not fit: enc head -> latent == generator input, etc."""
    for net in ("enc", "gen"):
        last = max(int(k.split(".lstm")[1].split(".")[0]) for k in weights
                   if k.startswith(f"{net}.lstm"))
        hidden = weights[f"{net}.lstm{last}.R"].shape[2]
        head_in = weights[f"{net}.head.W"].shape[1]
        if head_in != hidden:
            raise ValueError(f"{net}.head expects {head_in} inputs but the last LSTM has {hidden}")
    latent = weights["enc.head.W"].shape[0]
    gen_in = weights["gen.lstm0.W"].shape[2]
    if latent != gen_in:
        raise ValueError(f"encoder latent size {latent} != generator input size {gen_in}")
    channels_in = weights["enc.lstm0.W"].shape[2]
    channels_out = weights["gen.head.W"].shape[0]
    if channels_in != channels_out:
        raise ValueError(f"encoder reads {channels_in} channels but generator writes {channels_out}")


def _torch_gates(a: np.ndarray, hidden: int) -> np.ndarray:
    """The inverse of _reorder_gates: ONNX blocks (i, o, f, c) back to torch's (i, f, g, o)."""
    blocks = [a[g * hidden:(g + 1) * hidden] for g in range(4)]
    onnx_of_torch = [_TORCH_TO_ONNX_GATES.index(g) for g in range(4)]
    return np.concatenate([blocks[k] for k in onnx_of_torch], axis=0)


def stacks_from_weights(weights: Dict[str, np.ndarray]) -> tuple:
    """The contract dict back as torch modules: (encoder, generator), each a
    compile.model.LSTMStack holding exactly these numbers (network_weights of them returns the
    dict). Used to fine-tune a network that exists only as a dict (a cached student)."""
    _check_chain(weights)
    return tuple(_stack_from(weights, net) for net in ("enc", "gen"))


def _stack_from(weights: Dict[str, np.ndarray], net: str) -> TorchStack:
    count = sum(1 for k in weights if k.startswith(f"{net}.lstm") and k.endswith(".R"))
    hidden = tuple(int(weights[f"{net}.lstm{k}.R"].shape[2]) for k in range(count))
    head = weights[f"{net}.head.W"]
    stack = TorchStack(int(weights[f"{net}.lstm0.W"].shape[2]), hidden, int(head.shape[0]))
    with torch.no_grad():
        for k, layer in enumerate(stack.layers):
            h, key = hidden[k], f"{net}.lstm{k}"
            bias = weights[f"{key}.B"][0]
            for name, value in (("weight_ih_l0", weights[f"{key}.W"][0]),
                                ("weight_hh_l0", weights[f"{key}.R"][0]),
                                ("bias_ih_l0", bias[:4 * h]), ("bias_hh_l0", bias[4 * h:])):
                getattr(layer, name).copy_(torch.from_numpy(_torch_gates(value, h)))
        stack.head.weight.copy_(torch.from_numpy(head))
        stack.head.bias.copy_(torch.from_numpy(weights[f"{net}.head.b"]))
    return stack
