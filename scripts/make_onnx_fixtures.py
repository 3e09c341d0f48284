#!/usr/bin/env python3
"""Writes the ONNX reference fixtures in tests/fixtures/onnx/ (used by tests/onnx_reference.rs).

Each case is an ONNX model built with the `onnx` package's helpers (or exported from PyTorch
with tools/receptor_export.py's export_onnx when torch imports), a probe CSV in receptor's
input order (channel-last for images), and the outputs onnxruntime (CPU) computes for it:

  NAME.onnx            the model (NAME.bin beside it for the external-data case)
  NAME_probe.csv       probe rows, header x0..x{n-1}, float32 values written exactly
  NAME_expected.json   {"outputs": [[...]], "layers": [...], "layout": ..., "labels": ...}

Versions of Python, numpy, onnx, onnxruntime (and torch) go to VERSIONS.txt. Deterministic
for a given set of versions (seeded numpy; torch seeded too).

Usage: python3 scripts/make_onnx_fixtures.py   (needs: pip install onnx onnxruntime numpy;
optional: torch)
"""

import json
import os
import platform
import sys
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
OUT = REPO / "tests" / "fixtures" / "onnx"
sys.path.insert(0, str(REPO / "tools"))

RNG = np.random.default_rng(20261202)
ROWS = 16


def weights(*shape, scale=0.6):
    return (RNG.standard_normal(shape) * scale).astype(np.float32)


def tensor(name, array, raw=True, dtype=None):
    """An initializer; raw=False stores the values in the typed field (float_data etc.)."""
    a = np.asarray(array)
    if dtype is not None:
        a = a.astype(dtype)
    if raw:
        return numpy_helper.from_array(a, name)
    elem = helper.np_dtype_to_tensor_dtype(a.dtype)
    return helper.make_tensor(name, elem, a.shape, a.ravel().tolist(), raw=False)


def model(name, nodes, inits, in_shape, out_units, elem=TensorProto.FLOAT, meta=None, opset=17):
    graph = helper.make_graph(
        nodes,
        name,
        [helper.make_tensor_value_info("input", elem, in_shape)],
        [helper.make_tensor_value_info("output", elem, ["batch", out_units])],
        initializer=inits,
    )
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)], producer_name="make_onnx_fixtures")
    m.ir_version = 8
    for k, v in (meta or {}).items():
        e = m.metadata_props.add()
        e.key, e.value = k, v
    onnx.checker.check_model(m)
    return m


def probe_rows(shape, low=-1.0, high=1.0):
    """Inputs in ONNX's layout (float32)."""
    return RNG.uniform(low, high, size=(ROWS, *shape)).astype(np.float32)


def channel_last(x):
    """[N, C, H, W] to receptor's rows [N, H * W * C] (channel last)."""
    if x.ndim == 4:
        return x.transpose(0, 2, 3, 1).reshape(x.shape[0], -1)
    return x


def run_ort(path, x):
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    (out,) = sess.run(None, {sess.get_inputs()[0].name: x})
    return out


def write_case(name, m, x, layers, layout, labels=None, external=False, ort_model=None):
    path = OUT / f"{name}.onnx"
    if external:
        onnx.save_model(m, path, save_as_external_data=True, all_tensors_to_one_file=True, location=f"{name}.bin", size_threshold=0)
    else:
        onnx.save_model(m, path)
    # onnxruntime runs the saved file itself (or a float32 twin where its CPU kernels lack
    # the element type; the twin holds exactly the same values).
    ref_path = path
    if ort_model is not None:
        ref_path = OUT / f".{name}_twin.onnx"
        onnx.save_model(ort_model, ref_path)
    out = run_ort(ref_path, x).astype(np.float64)
    if ref_path != path:
        os.remove(ref_path)
    rows = channel_last(x.astype(np.float32))
    with open(OUT / f"{name}_probe.csv", "w") as f:
        f.write(",".join(f"x{i}" for i in range(rows.shape[1])) + "\n")
        for r in rows:
            f.write(",".join(repr(float(v)) for v in r) + "\n")
    expected = {
        "outputs": out.tolist(),
        "layers": layers,
        "layout": layout,
        "labels": labels,
    }
    with open(OUT / f"{name}_expected.json", "w") as f:
        json.dump(expected, f, indent=1)
        f.write("\n")
    print(f"{name}: {len(layers)} layers, outputs {out.shape}")


def gemm_chain():
    """Gemm with transB, alpha, beta and C of shapes [4], [1, 3], [2]; Relu, LeakyRelu,
    Softmax over axis -1. float32 raw_data."""
    w1, c1 = weights(4, 5), weights(4)
    w2, c2 = weights(4, 3), weights(1, 3)  # transB = 0: [K, N]
    w3, c3 = weights(2, 3), weights(2)
    nodes = [
        helper.make_node("Gemm", ["input", "fc1.weight", "fc1.bias"], ["h1"], name="/fc1/Gemm", transB=1, alpha=0.7, beta=1.3),
        helper.make_node("Relu", ["h1"], ["a1"], name="/act1/Relu"),
        helper.make_node("Gemm", ["a1", "fc2.weight", "fc2.bias"], ["h2"], name="/fc2/Gemm"),
        helper.make_node("LeakyRelu", ["h2"], ["a2"], name="/act2/LeakyRelu", alpha=0.2),
        helper.make_node("Gemm", ["a2", "fc3.weight", "fc3.bias"], ["h3"], name="/fc3/Gemm", transB=1),
        helper.make_node("Softmax", ["h3"], ["output"], name="/softmax/Softmax", axis=-1),
    ]
    inits = [tensor("fc1.weight", w1), tensor("fc1.bias", c1), tensor("fc2.weight", w2), tensor("fc2.bias", c2), tensor("fc3.weight", w3), tensor("fc3.bias", c3)]
    m = model("gemm_chain", nodes, inits, ["batch", 5], 2)
    write_case("gemm_chain", m, probe_rows((5,)), ["fc1", "fc2", "fc3"], "vector")


def matmul_add():
    """MatMul + Add (bias [N] and [1, N]), Sigmoid, Tanh, Identity, Dropout, a MatMul without
    Add, scalar Gemm C; typed float_data fields instead of raw_data."""
    nodes = [
        helper.make_node("MatMul", ["input", "W1"], ["m1"], name="mm1"),
        helper.make_node("Add", ["m1", "B1"], ["z1"], name="add1"),
        helper.make_node("Sigmoid", ["z1"], ["s1"], name="sig1"),
        helper.make_node("Identity", ["s1"], ["i1"], name="id1"),
        helper.make_node("Dropout", ["i1"], ["d1"], name="drop1"),
        helper.make_node("MatMul", ["d1", "W2"], ["m2"], name="mm2"),
        helper.make_node("Add", ["B2", "m2"], ["z2"], name="add2"),
        helper.make_node("Tanh", ["z2"], ["t2"], name="tanh2"),
        helper.make_node("MatMul", ["t2", "W3"], ["m3"], name="mm3"),
        helper.make_node("Gemm", ["m3", "W4", "B4"], ["output"], name="gemm4", beta=0.5),
    ]
    inits = [
        tensor("W1", weights(6, 7), raw=False), tensor("B1", weights(7), raw=False),
        tensor("W2", weights(7, 4), raw=False), tensor("B2", weights(1, 4), raw=False),
        tensor("W3", weights(4, 4), raw=False),
        tensor("W4", weights(4, 3), raw=False), tensor("B4", np.array(0.25, dtype=np.float32), raw=False),
    ]
    m = model("matmul_add", nodes, inits, ["batch", 6], 3)
    write_case("matmul_add", m, probe_rows((6,)), ["mm1", "mm2", "mm3", "gemm4"], "vector")


def batchnorm_f16():
    """Gemm, BatchNormalization (folded), Relu, Gemm: float16 initializers (raw_data for
    the weights, int32_data for the batch-norm parameters). onnxruntime runs a float32 twin
    holding the same values (float16 to float32 is exact)."""
    w1 = weights(6, 4).astype(np.float16)
    b1 = weights(6).astype(np.float16)
    scale = RNG.uniform(0.5, 2.0, 6).astype(np.float16)
    shift = weights(6).astype(np.float16)
    mean = weights(6, scale=0.3).astype(np.float16)
    var = RNG.uniform(0.2, 1.5, 6).astype(np.float16)
    w2 = weights(3, 6).astype(np.float16)
    b2 = weights(3).astype(np.float16)
    nodes = [
        helper.make_node("Gemm", ["input", "dense.weight", "dense.bias"], ["h"], name="/dense/Gemm", transB=1),
        helper.make_node("BatchNormalization", ["h", "bn.weight", "bn.bias", "bn.running_mean", "bn.running_var"], ["n"], name="/bn/BatchNormalization", epsilon=1e-3),
        helper.make_node("Relu", ["n"], ["r"], name="/relu/Relu"),
        helper.make_node("Gemm", ["r", "head.weight", "head.bias"], ["output"], name="/head/Gemm", transB=1),
    ]

    def inits(dtype, raw_bn):
        return [
            tensor("dense.weight", w1, dtype=dtype), tensor("dense.bias", b1, dtype=dtype),
            tensor("bn.weight", scale, raw=raw_bn, dtype=dtype), tensor("bn.bias", shift, raw=raw_bn, dtype=dtype),
            tensor("bn.running_mean", mean, raw=raw_bn, dtype=dtype), tensor("bn.running_var", var, raw=raw_bn, dtype=dtype),
            tensor("head.weight", w2, dtype=dtype), tensor("head.bias", b2, dtype=dtype),
        ]

    m16 = model("batchnorm_f16", nodes, inits(np.float16, False), ["batch", 4], 3, elem=TensorProto.FLOAT16)
    m32 = model("batchnorm_f16_twin", nodes, inits(np.float32, True), ["batch", 4], 3)
    write_case("batchnorm_f16", m16, probe_rows((4,)), ["dense", "head"], "vector", ort_model=m32)


def double_weights():
    """float64 initializers (raw and double_data), Tanh then Gemm; onnxruntime runs the
    float64 model itself."""
    w1, b1, w2, b2 = (weights(5, 3).astype(np.float64), weights(5).astype(np.float64), weights(2, 5).astype(np.float64), weights(2).astype(np.float64))
    nodes = [
        helper.make_node("Gemm", ["input", "l1.weight", "l1.bias"], ["h"], name="l1", transB=1),
        helper.make_node("Tanh", ["h"], ["t"], name="t1"),
        helper.make_node("Gemm", ["t", "l2.weight", "l2.bias"], ["output"], name="l2", transB=1),
    ]
    inits = [tensor("l1.weight", w1), tensor("l1.bias", b1, raw=False), tensor("l2.weight", w2, raw=False), tensor("l2.bias", b2)]
    m = model("double_weights", nodes, inits, ["batch", 3], 2, elem=TensorProto.DOUBLE)
    x = probe_rows((3,)).astype(np.float64)
    write_case("double_weights", m, x, ["l1", "l2"], "vector")


def external_data():
    """Weights in an external data file beside the model (onnx's save_as_external_data)."""
    nodes = [
        helper.make_node("Gemm", ["input", "enc.weight", "enc.bias"], ["h"], name="/enc/Gemm", transB=1),
        helper.make_node("Relu", ["h"], ["r"], name="/enc/Relu"),
        helper.make_node("Gemm", ["r", "dec.weight", "dec.bias"], ["output"], name="/dec/Gemm", transB=1),
    ]
    inits = [tensor("enc.weight", weights(8, 6)), tensor("enc.bias", weights(8)), tensor("dec.weight", weights(4, 8)), tensor("dec.bias", weights(4))]
    m = model("external_data", nodes, inits, ["batch", 6], 4)
    write_case("external_data", m, probe_rows((6,)), ["enc", "dec"], "vector", external=True)


def image_flatten():
    """A colour image input [N, 3, 4, 5] (channel-first in ONNX), Flatten, Gemm, Relu, Gemm,
    with labels and the box in metadata_props. receptor's probe rows are channel-last."""
    nodes = [
        helper.make_node("Flatten", ["input"], ["f"], name="flat", axis=1),
        helper.make_node("Gemm", ["f", "hidden.weight", "hidden.bias"], ["h"], name="/hidden/Gemm", transB=1),
        helper.make_node("Relu", ["h"], ["r"], name="/hidden/Relu"),
        helper.make_node("Gemm", ["r", "hidden_2.weight", "hidden_2.bias"], ["output"], name="/out/Gemm", transB=1),
    ]
    inits = [tensor("hidden.weight", weights(7, 60, scale=0.2)), tensor("hidden.bias", weights(7)), tensor("hidden_2.weight", weights(3, 7)), tensor("hidden_2.bias", weights(3))]
    labels = ["cat", "dog", "bird"]
    meta = {"receptor.low": "0", "receptor.high": "1", "receptor.labels": json.dumps(labels)}
    m = model("image_flatten", nodes, inits, ["batch", 3, 4, 5], 3, meta=meta)
    write_case("image_flatten", m, probe_rows((3, 4, 5), 0.0, 1.0), ["hidden", "hidden_2"], "image 4x5x3", labels=labels)


def grey_reshape():
    """A grey image [1, 1, 6, 6] (fixed batch), Reshape to [0, -1] from a Constant node,
    Gemm, Sigmoid; two layers whose weights have the same name stem (made unique)."""
    shape = helper.make_node("Constant", [], ["shape"], name="shape_const", value=numpy_helper.from_array(np.array([0, -1], dtype=np.int64), "shape_value"))
    nodes = [
        shape,
        helper.make_node("Reshape", ["input", "shape"], ["f"], name="reshape"),
        helper.make_node("Gemm", ["f", "layer.weight", "layer.bias"], ["h"], name="g1", transB=1),
        helper.make_node("Sigmoid", ["h"], ["s"], name="sig"),
        helper.make_node("Gemm", ["s", "layer_weight", "out_bias"], ["output"], name="g2", transB=1),
    ]
    inits = [tensor("layer.weight", weights(5, 36, scale=0.3)), tensor("layer.bias", weights(5)), tensor("layer_weight", weights(2, 5)), tensor("out_bias", weights(2))]
    m = model("grey_reshape", nodes, inits, [1, 1, 6, 6], 2)
    # The batch axis is fixed at 1: onnxruntime runs one row at a time.
    x = probe_rows((1, 6, 6))
    path = OUT / "grey_reshape.onnx"
    onnx.save_model(m, path)
    outs = np.concatenate([run_ort(path, x[i : i + 1]) for i in range(ROWS)])
    write_rows_and_expected("grey_reshape", x, outs, ["layer", "layer_2"], "image 6x6x1")


def write_rows_and_expected(name, x, out, layers, layout, labels=None):
    rows = channel_last(x)
    with open(OUT / f"{name}_probe.csv", "w") as f:
        f.write(",".join(f"x{i}" for i in range(rows.shape[1])) + "\n")
        for r in rows:
            f.write(",".join(repr(float(v)) for v in r) + "\n")
    with open(OUT / f"{name}_expected.json", "w") as f:
        json.dump({"outputs": out.astype(np.float64).tolist(), "layers": layers, "layout": layout, "labels": labels}, f, indent=1)
        f.write("\n")
    print(f"{name}: {len(layers)} layers, outputs {out.shape}")


def torch_export(versions):
    """A PyTorch nn.Sequential (Linear, BatchNorm1d, ReLU, Dropout, Linear, Tanh, Linear,
    Softmax) exported by tools/receptor_export.py's export_onnx, box in the metadata."""
    try:
        import torch
        from torch import nn
    except ImportError:
        print("torch not installed: the PyTorch-exported case is skipped")
        return
    import receptor_export as rx

    versions.append(f"torch {torch.__version__}")
    torch.manual_seed(7)
    net = nn.Sequential(nn.Linear(6, 8), nn.BatchNorm1d(8), nn.ReLU(), nn.Dropout(0.2), nn.Linear(8, 5), nn.Tanh(), nn.Linear(5, 3), nn.Softmax(dim=1))
    # Non-trivial running statistics, as after training.
    with torch.no_grad():
        net[1].running_mean.copy_(torch.randn(8) * 0.3)
        net[1].running_var.copy_(torch.rand(8) + 0.5)
        net[1].weight.copy_(torch.rand(8) + 0.5)
        net[1].bias.copy_(torch.randn(8) * 0.2)
    path = rx.export_onnx(net, torch.zeros(2, 6), path=OUT / "torch_mlp.onnx", low=-2.0, high=2.0, labels=["a", "b", "c"])
    x = probe_rows((6,), -2.0, 2.0)
    out = run_ort(path, x)
    with torch.no_grad():
        direct = net(torch.from_numpy(x)).numpy()
    assert np.abs(direct - out).max() < 1e-5, "onnxruntime and PyTorch disagree"
    write_rows_and_expected("torch_mlp", x, out, ["0", "4", "6"], "vector", labels=["a", "b", "c"])


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    for p in OUT.iterdir():
        p.unlink()
    versions = [
        f"python {platform.python_version()}",
        f"numpy {np.__version__}",
        f"onnx {onnx.__version__}",
        f"onnxruntime {ort.__version__} (CPUExecutionProvider)",
    ]
    gemm_chain()
    matmul_add()
    batchnorm_f16()
    double_weights()
    external_data()
    image_flatten()
    grey_reshape()
    torch_export(versions)
    with open(OUT / "VERSIONS.txt", "w") as f:
        f.write("Made by scripts/make_onnx_fixtures.py with:\n")
        for v in versions:
            f.write(v + "\n")


if __name__ == "__main__":
    main()
