"""Train the digits example: a small CNN on scikit-learn's bundled 8x8 handwritten digits.

    .venv/bin/python examples/digits/make_digits.py        (needs scikit-learn; numpy only)

The data set ships inside scikit-learn (sklearn.datasets.load_digits: 1,797 images of 8x8
pixels, values 0..16, ten classes); nothing is downloaded. A fixed 80/20 stratified split
keeps 360 images out of training. The network is trained here with plain numpy (forward and
backward passes written out, Adam), written to ONNX with onnx.helper, and quantized by
onnxruntime's own static quantizer (QDQ, int8 activations and per-channel int8 weights,
calibrated on 256 training images). Written next to this file:

  digits_float.onnx    the float model
  digits.onnx          the quantized model tinygen compiles
  digits_test.npz      the held-out split: inputs (360, 1, 1, 8, 8) float32, labels (360,)
  sample_inputs.npz    its first 16 images, the bundled samples every example carries

tests/e2e/test_digits.py checks that the emitted C classifies the held-out split within one
percentage point of the float model.
"""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 20260
C1, C2, CLASSES = 8, 16, 10


def load_split():
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split
    d = load_digits()
    x = (d.images.astype(np.float32) / 16.0)[:, None]  # (N, 1, 8, 8) in [0, 1]
    return train_test_split(x, d.target.astype(np.int64), test_size=0.2, random_state=SEED,
                            stratify=d.target)


# -- a tiny numpy CNN: conv3x3(1->8) relu, conv3x3 stride 2 (8->16) relu, gemm(256->10) --

def im2col(x, k, stride, pad):
    n, c, h, w = x.shape
    xp = np.pad(x, ((0, 0), (0, 0), (pad, pad), (pad, pad)))
    oh, ow = (h + 2 * pad - k) // stride + 1, (w + 2 * pad - k) // stride + 1
    cols = np.empty((n, oh, ow, c, k, k), x.dtype)
    for i in range(k):
        for j in range(k):
            cols[:, :, :, :, i, j] = xp[:, :, i:i + stride * oh:stride,
                                        j:j + stride * ow:stride].transpose(0, 2, 3, 1)
    return cols.reshape(n, oh * ow, c * k * k), (oh, ow)


def col2im(dcols, shape, k, stride, pad, out_hw):
    n, c, h, w = shape
    oh, ow = out_hw
    dx = np.zeros((n, c, h + 2 * pad, w + 2 * pad), dcols.dtype)
    d = dcols.reshape(n, oh, ow, c, k, k)
    for i in range(k):
        for j in range(k):
            dx[:, :, i:i + stride * oh:stride, j:j + stride * ow:stride] += \
                d[:, :, :, :, i, j].transpose(0, 3, 1, 2)
    return dx[:, :, pad:pad + h, pad:pad + w]


class Net:
    def __init__(self, rng):
        def he(shape, fan_in):
            return (rng.standard_normal(shape) * np.sqrt(2.0 / fan_in)).astype(np.float32)
        self.p = {"w1": he((C1, 1, 3, 3), 9), "b1": np.zeros(C1, np.float32),
                  "w2": he((C2, C1, 3, 3), 9 * C1), "b2": np.zeros(C2, np.float32),
                  "w3": he((CLASSES, C2 * 16), C2 * 16), "b3": np.zeros(CLASSES, np.float32)}

    def conv(self, x, w, b, stride):
        cols, hw = im2col(x, 3, stride, 1)
        y = cols @ w.reshape(w.shape[0], -1).T + b
        return y.transpose(0, 2, 1).reshape(x.shape[0], w.shape[0], *hw), cols, hw

    def forward(self, x):
        p = self.p
        z1, c1, hw1 = self.conv(x, p["w1"], p["b1"], 1)
        a1 = np.maximum(z1, 0)
        z2, c2, hw2 = self.conv(a1, p["w2"], p["b2"], 2)
        a2 = np.maximum(z2, 0)
        f = a2.reshape(x.shape[0], -1)
        logits = f @ p["w3"].T + p["b3"]
        return logits, (x, z1, c1, hw1, a1, z2, c2, hw2, f)

    def backward(self, dlogits, cache):
        p = self.p
        x, z1, c1, hw1, a1, z2, c2, hw2, f = cache
        g = {"w3": dlogits.T @ f, "b3": dlogits.sum(0)}
        dz2 = (dlogits @ p["w3"]).reshape(z2.shape) * (z2 > 0)
        d2 = dz2.reshape(x.shape[0], C2, -1).transpose(0, 2, 1)  # (N, pixels, C2)
        g["w2"] = np.einsum("npo,npk->ok", d2, c2).reshape(p["w2"].shape)
        g["b2"] = d2.sum((0, 1))
        da1 = col2im(d2 @ p["w2"].reshape(C2, -1), a1.shape, 3, 2, 1, hw2)
        d1 = (da1 * (z1 > 0)).reshape(x.shape[0], C1, -1).transpose(0, 2, 1)
        g["w1"] = np.einsum("npo,npk->ok", d1, c1).reshape(p["w1"].shape)
        g["b1"] = d1.sum((0, 1))
        return g


def train(x, y, rng, epochs=60, batch=32, lr=2e-3):
    net = Net(rng)
    m = {k: np.zeros_like(v) for k, v in net.p.items()}
    v = {k: np.zeros_like(val) for k, val in net.p.items()}
    step = 0
    for _ in range(epochs):
        order = rng.permutation(len(x))
        for s in range(0, len(x), batch):
            idx = order[s:s + batch]
            logits, cache = net.forward(x[idx])
            e = np.exp(logits - logits.max(1, keepdims=True))
            prob = e / e.sum(1, keepdims=True)
            prob[np.arange(len(idx)), y[idx]] -= 1
            grads = net.backward(prob / len(idx), cache)
            step += 1
            for k, gk in grads.items():  # Adam, small weight decay
                gk = gk + 1e-4 * net.p[k]
                m[k] = 0.9 * m[k] + 0.1 * gk
                v[k] = 0.999 * v[k] + 0.001 * gk * gk
                mh, vh = m[k] / (1 - 0.9 ** step), v[k] / (1 - 0.999 ** step)
                net.p[k] -= (lr * mh / (np.sqrt(vh) + 1e-8)).astype(np.float32)
    return net


def to_onnx(net):
    import onnx
    from onnx import TensorProto, helper, numpy_helper
    p = net.p
    inits = [numpy_helper.from_array(p[k].astype(np.float32), k) for k in p]
    nodes = [helper.make_node("Conv", ["input", "w1", "b1"], ["conv1"], name="conv1",
                              pads=[1, 1, 1, 1], kernel_shape=[3, 3]),
             helper.make_node("Relu", ["conv1"], ["relu1"], name="relu1"),
             helper.make_node("Conv", ["relu1", "w2", "b2"], ["conv2"], name="conv2",
                              pads=[1, 1, 1, 1], strides=[2, 2], kernel_shape=[3, 3]),
             helper.make_node("Relu", ["conv2"], ["relu2"], name="relu2"),
             helper.make_node("Flatten", ["relu2"], ["flat"], name="flatten", axis=1),
             helper.make_node("Gemm", ["flat", "w3", "b3"], ["scores"], name="classifier",
                              transB=1)]
    graph = helper.make_graph(
        nodes, "digits", [helper.make_tensor_value_info("input", TensorProto.FLOAT,
                                                         [1, 1, 8, 8])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, [1, CLASSES])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def quantize(float_path: Path, out_path: Path, calib: np.ndarray) -> None:
    from onnxruntime.quantization import (
        CalibrationDataReader,
        QuantFormat,
        QuantType,
        quantize_static,
    )

    class Reader(CalibrationDataReader):
        def __init__(self):
            self.items = iter([{"input": calib[i:i + 1]} for i in range(len(calib))])

        def get_next(self):
            return next(self.items, None)

    quantize_static(str(float_path), str(out_path), Reader(), quant_format=QuantFormat.QDQ,
                    activation_type=QuantType.QInt8, weight_type=QuantType.QInt8,
                    per_channel=True)


def main() -> None:
    import onnx
    x_train, x_test, y_train, y_test = load_split()
    rng = np.random.default_rng(SEED)
    net = train(x_train, y_train, rng)
    acc = float(np.mean(net.forward(x_test)[0].argmax(1) == y_test))
    print(f"float accuracy on the held-out split (numpy): {100 * acc:.2f}%")
    model = to_onnx(net)
    onnx.save(model, HERE / "digits_float.onnx")
    with tempfile.TemporaryDirectory() as tmp:
        calib = x_train[rng.permutation(len(x_train))[:256]]
        quantize(HERE / "digits_float.onnx", Path(tmp) / "q.onnx", calib)
        q = onnx.load(Path(tmp) / "q.onnx")
    onnx.save(q, HERE / "digits.onnx")
    # --inputs takes (N, *input shape): the model's input is [1, 1, 8, 8]
    batched = x_test[:, None]
    np.savez_compressed(HERE / "digits_test.npz", inputs=batched, labels=y_test)
    np.savez_compressed(HERE / "sample_inputs.npz", inputs=batched[:16], labels=y_test[:16])
    print(f"wrote {len(x_test)} held-out images and the models to {HERE}")


if __name__ == "__main__":
    main()
