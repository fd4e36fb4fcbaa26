"""The numpy LSTM scorer: ONNX LSTM operator semantics, forward direction, float32.

The equations are those of the ONNX LSTM operator (opset 14+) with its default activations
(f = sigmoid, g = tanh, h = tanh), no peepholes, no clipping, one direction:

    gates = X_t W^T + H_{t-1} R^T + Wb + Rb          gate order i, o, f, c (ONNX)
    i = f(gates_i)   o = f(gates_o)   f_t = f(gates_f)   c~ = g(gates_c)
    C_t = f_t * C_{t-1} + i * c~
    H_t = o * h(C_t)

Weight layout (DEVELOPERS.md): W [1, 4H, I], R [1, 4H, H], B [1, 8H] = [Wb, Rb].
Because the layout is the operator's own, one weight file serves this scorer and an ONNX model.

The network is the contract in DEVELOPERS.md (contract_shapes below states its layout once):
encoder LSTM stack + linear head -> latent sequence z; generator LSTM stack + linear head ->
reconstruction; per channel the mean squared residual over the window. score.py turns the
residuals into the score.
"""

from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np

F32 = np.float32


def _as_state(s: Optional[np.ndarray], n: int, h: int, name: str) -> np.ndarray:
    """Initial h or c: None -> zeros; accepts the operator's [1, N, H] or plain [N, H]."""
    if s is None:
        return np.zeros((n, h), dtype=F32)
    s = np.asarray(s, dtype=F32)
    if s.ndim == 3 and s.shape[0] == 1:
        s = s[0]
    if s.shape != (n, h):
        raise ValueError(f"{name} must have shape [1, {n}, {h}] or [{n}, {h}], got {s.shape}")
    return s


def _lstm_layer(
    x: np.ndarray, wt: np.ndarray, rt: np.ndarray, b: np.ndarray, h: np.ndarray, c: np.ndarray
) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One LSTM layer over time. x [T, N, I]; wt [I, 4H]; rt [H, 4H]; b [4H] (Wb + Rb), all as
    _prepare returns them (i, o, f columns halved).

    The input projection of all time steps is one matmul; only the recurrence loops over time.
    """
    t_len, n = x.shape[0], x.shape[1]
    hid = rt.shape[0]
    xproj = x.reshape(t_len * n, -1) @ wt
    xproj = xproj.reshape(t_len, n, 4 * hid)
    xproj += b
    y = np.empty((t_len, n, hid), dtype=F32)
    for t in range(t_len):
        act = np.tanh(xproj[t] + h @ rt)
        sig = act[:, : 3 * hid]
        sig *= F32(0.5)
        sig += F32(0.5)
        i_g = sig[:, :hid]
        o_g = sig[:, hid : 2 * hid]
        f_g = sig[:, 2 * hid : 3 * hid]
        c_new = act[:, 3 * hid :]
        c = f_g * c + i_g * c_new
        h = o_g * np.tanh(c)
        y[t] = h
    return y, h, c


def _check_lstm_weights(W: np.ndarray, R: np.ndarray, B: np.ndarray, name: str = "LSTM") -> int:
    """Validate ONNX LSTM shapes; returns hidden size H."""
    if W.ndim != 3 or W.shape[0] != 1 or W.shape[1] % 4 != 0:
        raise ValueError(f"{name}: W must have shape [1, 4H, I] (forward only), got {W.shape}")
    hid = W.shape[1] // 4
    if R.shape != (1, 4 * hid, hid):
        raise ValueError(f"{name}: R must have shape [1, {4 * hid}, {hid}], got {R.shape}")
    if B.shape != (1, 8 * hid):
        raise ValueError(f"{name}: B must have shape [1, {8 * hid}], got {B.shape}")
    return hid


def _prepare(W: np.ndarray, R: np.ndarray, B: Optional[np.ndarray], name: str = "LSTM"):
    """ONNX layout -> (W^T [I, 4H], R^T [H, 4H], Wb + Rb [4H]), contiguous float32."""
    W = np.asarray(W, dtype=F32)
    R = np.asarray(R, dtype=F32)
    if B is None:  # the operator's B is optional and defaults to zeros
        B = np.zeros((1, 2 * W.shape[1]), dtype=F32)
    B = np.asarray(B, dtype=F32)
    hid = _check_lstm_weights(W, R, B, name)
    # logistic(x) = (1 + tanh(x / 2)) / 2, an exact identity. Halving the i, o, f columns once
    # here (exact in binary floating point) lets one tanh per step serve all four gates in
    # _lstm_layer, and tanh cannot overflow.
    half = np.ones(4 * hid, dtype=F32)
    half[: 3 * hid] = F32(0.5)
    wt = np.ascontiguousarray(W[0].T * half)
    rt = np.ascontiguousarray(R[0].T * half)
    b = ((B[0, : 4 * hid] + B[0, 4 * hid :]) * half).astype(F32)
    return wt, rt, b


def lstm_forward(
    x: np.ndarray,
    W: np.ndarray,
    R: np.ndarray,
    B: Optional[np.ndarray] = None,
    h0: Optional[np.ndarray] = None,
    c0: Optional[np.ndarray] = None,
) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The ONNX LSTM operator, forward direction, default activations, float32.

    x [T, N, I] (time-major, as the operator). Returns Y [T, N, H], h_last [N, H], c_last [N, H]:
    the operator's Y [T, 1, N, H], Y_h and Y_c with the num_directions axis (= 1) dropped.
    h0, c0 may be [1, N, H] or [N, H]; None means zeros.
    """
    x = np.asarray(x, dtype=F32)
    if x.ndim != 3:
        raise ValueError(f"x must have shape [T, N, I], got {x.shape}")
    wt, rt, b = _prepare(W, R, B)
    if wt.shape[0] != x.shape[2]:
        raise ValueError(f"x has {x.shape[2]} inputs but W expects {wt.shape[0]}")
    n, hid = x.shape[1], rt.shape[0]
    h = _as_state(h0, n, hid, "h0")
    c = _as_state(c0, n, hid, "c0")
    return _lstm_layer(x, wt, rt, b, h, c)


def contract_shapes(n_channels: int, encoder: Sequence[int], latent: int,
                    generator: Sequence[int]) -> Dict[str, Tuple[int, ...]]:
    """Every key of the network's weight dict and its shape (DEVELOPERS.md, "the network
    contract"): the one statement of the layout that the manifest, the exporter, the packer and
    this scorer check against."""
    shapes = {}
    for net, sizes, n_in, n_out in (("enc", encoder, n_channels, latent),
                                    ("gen", generator, latent, n_channels)):
        prev = n_in
        for k, h in enumerate(sizes):
            shapes[f"{net}.lstm{k}.W"] = (1, 4 * h, prev)
            shapes[f"{net}.lstm{k}.R"] = (1, 4 * h, h)
            shapes[f"{net}.lstm{k}.B"] = (1, 8 * h)
            prev = h
        shapes[f"{net}.head.W"] = (n_out, prev)
        shapes[f"{net}.head.b"] = (n_out,)
    return shapes


def architecture(weights: Dict[str, np.ndarray]) -> Tuple[int, List[int], int, List[int]]:
    """(channels, encoder widths, latent, generator widths) of a float32 weight dict, after
    checking that its keys and shapes are exactly contract_shapes(...) of those sizes."""
    sizes = {}
    for net in ("enc", "gen"):
        widths = []
        while f"{net}.lstm{len(widths)}.R" in weights:
            widths.append(int(np.shape(weights[f"{net}.lstm{len(widths)}.R"])[-1]))
        if not widths:
            raise ValueError(f"weights have no '{net}.lstm0.R': not a ganlet network "
                             "(see DEVELOPERS.md)")
        sizes[net] = widths
    try:
        n_channels = int(np.shape(weights["enc.lstm0.W"])[2])
        latent = int(np.shape(weights["enc.head.W"])[0])
    except (KeyError, IndexError):
        raise ValueError("weights lack enc.lstm0.W [1, 4H, C] or enc.head.W [K, H]") from None
    expected = contract_shapes(n_channels, sizes["enc"], latent, sizes["gen"])
    unknown = sorted(set(weights) - set(expected))
    if unknown:
        raise ValueError(f"unexpected weight keys {unknown} (quantised? use load_weights)")
    for key, shape in expected.items():
        if key not in weights:
            raise ValueError(f"weights are missing {key!r}")
        got = tuple(np.shape(weights[key]))
        if got != shape:
            raise ValueError(f"{key} has shape {got}, the network implies {shape}: each "
                             "layer's input size is the previous width "
                             f"({n_channels} channels, encoder {sizes['enc']}, latent {latent}, "
                             f"generator {sizes['gen']})")
    return n_channels, sizes["enc"], latent, sizes["gen"]


class Network:
    """Encoder + generator from a float32 ONNX-layout weight dict (DEVELOPERS.md).

    Window length is free: the same weights score windows of any length L.
    Transposed weights and summed biases are prepared once here, so scoring a hop is
    matmuls and elementwise operations only.
    """

    def __init__(self, weights: Dict[str, np.ndarray]):
        self._n_channels, enc, self._latent, gen = architecture(weights)
        self._sizes = {"enc": enc, "gen": gen}
        self._layers: Dict[str, List[Tuple[np.ndarray, np.ndarray, np.ndarray]]] = {}
        self._heads: Dict[str, Tuple[np.ndarray, np.ndarray]] = {}
        for net in ("enc", "gen"):
            self._layers[net] = [
                _prepare(weights[f"{net}.lstm{k}.W"], weights[f"{net}.lstm{k}.R"],
                         weights[f"{net}.lstm{k}.B"], f"{net}.lstm{k}")
                for k in range(len(self._sizes[net]))
            ]
            hw = np.asarray(weights[f"{net}.head.W"], dtype=F32)
            self._heads[net] = (np.ascontiguousarray(hw.T),
                                np.asarray(weights[f"{net}.head.b"], dtype=F32))

    @property
    def encoder_sizes(self) -> List[int]:
        return list(self._sizes["enc"])

    @property
    def generator_sizes(self) -> List[int]:
        return list(self._sizes["gen"])

    @property
    def n_channels(self) -> int:
        return self._n_channels

    @property
    def latent(self) -> int:
        return self._latent

    def _run(self, net: str, seq: np.ndarray) -> np.ndarray:
        """seq [T, N, I] time-major -> head output [T, N, out]."""
        n = seq.shape[1]
        for wt, rt, b in self._layers[net]:
            hid = rt.shape[0]
            zeros = np.zeros((n, hid), dtype=F32)
            seq, _, _ = _lstm_layer(seq, wt, rt, b, zeros, zeros)
        hwt, hb = self._heads[net]
        return seq @ hwt + hb

    def _windows(self, windows: np.ndarray) -> np.ndarray:
        w = np.asarray(windows, dtype=F32)
        if w.ndim == 2:
            raise ValueError("windows must be [N, L, C]; for one window use windows[None]")
        if w.ndim != 3 or w.shape[2] != self._n_channels:
            raise ValueError(f"windows must have shape [N, L, {self._n_channels}], got {w.shape}")
        return w

    def encode(self, windows: np.ndarray) -> np.ndarray:
        """windows [N, L, C] -> latent sequences z [N, L, K]."""
        w = self._windows(windows)
        z = self._run("enc", w.transpose(1, 0, 2))
        return np.ascontiguousarray(z.transpose(1, 0, 2))

    def reconstruct(self, windows: np.ndarray) -> np.ndarray:
        """windows [N, L, C] -> G(E(x)) [N, L, C]."""
        w = self._windows(windows)
        z = self._run("enc", w.transpose(1, 0, 2))
        r = self._run("gen", z)
        return np.ascontiguousarray(r.transpose(1, 0, 2))

    def forward(self, windows: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
        """windows [N, L, C] -> (reconstruction [N, L, C], residuals [N, C]).

        residuals[n, c] = mean over time of (x - r)^2: the per-channel part of the score.
        """
        w = self._windows(windows)
        recon = self.reconstruct(w)
        err = w - recon
        residuals = np.mean(err * err, axis=1, dtype=F32)
        return recon, residuals

    def flops_per_window(self, window_len: int) -> int:
        """Estimate: 2 x multiply-adds of the matrix products for one window of `window_len` steps.

        Per LSTM layer and step: 4H x (I + H) multiply-adds; per head and step: in x out.
        Elementwise work (biases, activations, cell update: about 10H per layer-step) and the
        residual are left out; they are O(H) against O(H x (I + H)).
        """
        if window_len < 1:
            raise ValueError("window_len must be >= 1")
        macs = 0
        for net in ("enc", "gen"):
            for wt, rt, _ in self._layers[net]:
                macs += wt.shape[1] * (wt.shape[0] + rt.shape[0])
            hwt = self._heads[net][0]
            macs += hwt.shape[0] * hwt.shape[1]
        return int(2 * macs * window_len)
