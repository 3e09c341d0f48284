#!/usr/bin/env python3
"""Tests of tools/receptor_export.py: export with numpy, then run the real `receptor forward`
binary on the exported model and compare its output with a numpy forward pass (dense and
convolutional networks; the numpy convolution and pooling below are written from PyTorch's
documented definitions of `conv2d`, `max_pool2d` and `avg_pool2d`). The PyTorch path is
compared with the PyTorch module's own output.

Needs numpy and safetensors (pip install numpy safetensors); torch is optional (the PyTorch
path is tested only where torch imports). The receptor binary is taken from $RECEPTOR_BIN,
else from $CARGO_TARGET_DIR/release/receptor or target/release/receptor; without one the
binary tests fail (they do not skip).

Run with pytest (`python3 -m pytest tools/test_receptor_export.py`) or plainly
(`python3 tools/test_receptor_export.py`, which prints "N passed, N failed").
"""

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import receptor_export as rx  # noqa: E402

REPO = Path(__file__).resolve().parent.parent

# float32 forward pass (receptor) vs float64 numpy on O(1) values with <= 64 summands:
# 1e-5 is ~100 float32 ulps (common practice, no source).
TOL = 1e-5


class Skip(Exception):
    """Raised by a test that cannot run here (torch missing) in the plain runner."""


def skip(msg):
    """Skips the current test: pytest's skip under pytest, else our Skip."""
    if "pytest" in sys.modules:
        import pytest

        pytest.skip(msg)
    raise Skip(msg)


def receptor_bin():
    env = os.environ.get("RECEPTOR_BIN")
    if env:
        return env
    candidates = []
    if os.environ.get("CARGO_TARGET_DIR"):
        candidates.append(Path(os.environ["CARGO_TARGET_DIR"]) / "release" / "receptor")
    candidates.append(REPO / "target" / "release" / "receptor")
    for c in candidates:
        if c.is_file():
            return str(c)
    raise AssertionError(
        "no receptor binary: set RECEPTOR_BIN (e.g. after `cargo build --release`)"
    )


def np_forward(layers, x):
    """Reference forward pass in float64 numpy, from the schema's activation definitions."""
    a = x.astype(np.float64)
    for _name, w, b, act in layers:
        z = a @ np.asarray(w, np.float32).astype(np.float64).T + np.asarray(b, np.float32)
        if isinstance(act, tuple):
            act, alpha = act
        if act == "relu":
            a = np.maximum(z, 0.0)
        elif act == "leaky_relu":
            a = np.where(z > 0, z, alpha * z)
        elif act == "tanh":
            a = np.tanh(z)
        elif act in ("sigmoid", "logistic"):
            a = 1.0 / (1.0 + np.exp(-z))
        elif act == "identity":
            a = z
        elif act == "softmax":
            e = np.exp(z - z.max(axis=1, keepdims=True))
            a = e / e.sum(axis=1, keepdims=True)
        else:
            raise AssertionError(act)
    return a


def _pair(v):
    return (v, v) if isinstance(v, int) else (v[0], v[1])


def np_conv2d(x, w, b, stride, padding, dilation):
    """Cross-correlation as `torch.nn.functional.conv2d` defines it, float64:
    x [N, C, H, W], w [O, C, kh, kw] -> [N, O, oh, ow], zero padding."""
    (sh, sw), (ph, pw), (dh, dw) = _pair(stride), _pair(padding), _pair(dilation)
    n, c, h, wd = x.shape
    o, c2, kh, kw = w.shape
    assert c == c2
    xp = np.pad(x, ((0, 0), (0, 0), (ph, ph), (pw, pw)))
    oh = (h + 2 * ph - dh * (kh - 1) - 1) // sh + 1
    ow = (wd + 2 * pw - dw * (kw - 1) - 1) // sw + 1
    out = np.zeros((n, o, oh, ow))
    for i in range(kh):
        for j in range(kw):
            patch = xp[:, :, i * dh: i * dh + sh * (oh - 1) + 1: sh, j * dw: j * dw + sw * (ow - 1) + 1: sw]
            out += np.einsum("nchw,oc->nohw", patch, w[:, :, i, j])
    return out + np.asarray(b, np.float64)[None, :, None, None]


def np_pool(x, kind, kernel, stride, padding):
    """`max_pool2d` (padding never wins: -inf) or `avg_pool2d` (count_include_pad=True:
    the divisor is always kh * kw), floor mode, as PyTorch defines them."""
    (kh, kw), (sh, sw), (ph, pw) = _pair(kernel), _pair(stride), _pair(padding)
    fill = -np.inf if kind == "max_pool2d" else 0.0
    xp = np.pad(x, ((0, 0), (0, 0), (ph, ph), (pw, pw)), constant_values=fill)
    n, c, h, w = x.shape
    oh = (h + 2 * ph - kh) // sh + 1
    ow = (w + 2 * pw - kw) // sw + 1
    cells = np.stack(
        [xp[:, :, i: i + sh * (oh - 1) + 1: sh, j: j + sw * (ow - 1) + 1: sw] for i in range(kh) for j in range(kw)]
    )
    return cells.max(axis=0) if kind == "max_pool2d" else cells.sum(axis=0) / (kh * kw)


def np_activation(z, entry):
    act = entry["activation"]
    if act == "relu":
        return np.maximum(z, 0.0)
    if act == "leaky_relu":
        return np.where(z > 0, z, entry["alpha"] * z)
    if act == "tanh":
        return np.tanh(z)
    if act == "sigmoid":
        return 1.0 / (1.0 + np.exp(-z))
    if act == "identity":
        return z
    if act == "softmax":
        e = np.exp(z - z.max(axis=1, keepdims=True))
        return e / e.sum(axis=1, keepdims=True)
    raise AssertionError(act)


def np_forward_file(model_path, x):
    """Reference forward pass of an exported file, read with json and safetensors' own
    numpy loader: the flat channel-last input is reshaped to [N, C, H, W] for the
    convolutional layers, `flatten` uses numpy's C order on [N, C, H, W] (PyTorch's)."""
    model_path = Path(model_path)
    doc = json.loads(model_path.read_text())

    def tensor(v):
        if isinstance(v, dict):
            from safetensors.numpy import load_file

            return load_file(str(model_path.parent / v["safetensors"]))[v["tensor"]].astype(np.float64)
        return np.asarray(v, np.float32).astype(np.float64)

    lay = doc["input"]["layout"]
    a = x.astype(np.float64)
    flat = True
    for entry in doc["layers"]:
        kind = entry["type"]
        if kind == "dense":
            if not flat:
                raise AssertionError("dense after a map")
            a = np_activation(a @ tensor(entry["weights"]).T + tensor(entry["bias"]), entry)
            continue
        if flat:
            a = a.reshape(len(a), lay["height"], lay["width"], lay["channels"]).transpose(0, 3, 1, 2)
            flat = False
        if kind == "conv2d":
            z = np_conv2d(a, tensor(entry["weights"]), tensor(entry["bias"]), entry["stride"],
                          entry["padding"], entry["dilation"])
            a = np_activation(z, entry)
        elif kind in ("max_pool2d", "avg_pool2d"):
            a = np_pool(a, kind, entry["kernel"], entry["stride"], entry["padding"])
        elif kind == "flatten":
            a = a.reshape(len(a), -1)
            flat = True
        else:
            raise AssertionError(kind)
    return a


def write_probe(path, x):
    with open(path, "w", encoding="utf-8") as fh:
        for row in x:
            fh.write(",".join(str(np.float32(v)) for v in row) + "\n")


def run_forward(model, probe):
    """`receptor forward MODEL --probe PROBE --format json` -> (outputs [rows, units], predicted)."""
    proc = subprocess.run(
        [receptor_bin(), "forward", str(model), "--probe", str(probe), "--format", "json"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 0, f"receptor forward failed ({proc.returncode}): {proc.stderr}"
    rows = json.loads(proc.stdout)["rows"]
    return rows


def outputs_of(rows, names):
    return np.array([[r[n] for n in names] for r in rows], dtype=np.float64)


def random_net(rng, sizes, acts):
    layers = []
    for i, (fan_in, units) in enumerate(zip(sizes[:-1], sizes[1:])):
        w = rng.normal(0.0, 1.0 / np.sqrt(fan_in), size=(units, fan_in)).astype(np.float32)
        b = rng.normal(0.0, 0.1, size=units).astype(np.float32)
        layers.append((f"fc{i + 1}", w, b, acts[i]))
    return layers


# ---------------------------------------------------------------------------------------


def test_inline_model_matches_numpy_forward():
    rng = np.random.default_rng(0)
    acts = ["relu", ("leaky_relu", 0.2), "tanh", "sigmoid", "softmax"]
    layers = random_net(rng, [6, 7, 5, 5, 4, 3], acts)
    x = rng.uniform(-1.0, 1.0, size=(40, 6)).astype(np.float32)
    with tempfile.TemporaryDirectory() as d:
        model = Path(d) / "net.json"
        rx.export_arrays(
            layers,
            6,
            -1.0,
            1.0,
            names=[f"f{i}" for i in range(6)],
            labels=["cat", "dog", "eel"],
            path=model,
            safetensors_threshold=None,
        )
        doc = json.loads(model.read_text())
        assert doc["schema"] == "receptor-model/1"
        assert [l["activation"] for l in doc["layers"]] == [
            "relu", "leaky_relu", "tanh", "sigmoid", "softmax"
        ]
        assert doc["layers"][1]["alpha"] == 0.2
        # Inline weights read back as exactly the float32 values given.
        assert np.array_equal(np.asarray(doc["layers"][0]["weights"], np.float32), layers[0][1])
        assert not list(Path(d).glob("*.safetensors"))
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        rows = run_forward(model, probe)
        assert len(rows) == 40
        got = outputs_of(rows, ["cat", "dog", "eel"])
        want = np_forward(layers, x)
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))
        names = np.array(["cat", "dog", "eel"])
        assert [r["predicted"] for r in rows] == list(names[np.argmax(want, axis=1)])


def test_large_tensors_go_to_safetensors_side_file():
    from safetensors.numpy import load_file

    rng = np.random.default_rng(1)
    layers = random_net(rng, [16, 32, 8, 4], ["relu", "tanh", "identity"])
    x = rng.uniform(0.0, 1.0, size=(25, 16)).astype(np.float32)
    with tempfile.TemporaryDirectory() as d:
        model = Path(d) / "sub" / "big.json"
        # fc1.weight (512) and fc2.weight (256) reach the threshold; fc3 (32) and biases do not.
        rx.export_arrays(
            layers, 16, 0.0, 1.0, layout=(4, 4), path=model, safetensors_threshold=256
        )
        doc = json.loads(model.read_text())
        assert doc["input"]["layout"] == {"kind": "image", "height": 4, "width": 4, "channels": 1}
        ref = doc["layers"][0]["weights"]
        assert ref == {"safetensors": "big.safetensors", "tensor": "fc1.weight"}, ref
        assert doc["layers"][1]["weights"]["tensor"] == "fc2.weight"
        assert isinstance(doc["layers"][2]["weights"], list)
        assert isinstance(doc["layers"][0]["bias"], list)
        side = load_file(str(model.parent / "big.safetensors"))
        assert sorted(side) == ["fc1.weight", "fc2.weight"]
        assert side["fc1.weight"].dtype == np.float32 and side["fc1.weight"].shape == (32, 16)
        assert np.array_equal(side["fc1.weight"], layers[0][1])
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        rows = run_forward(model, probe)
        got = outputs_of(rows, ["out0", "out1", "out2", "out3"])
        want = np_forward(layers, x)
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))


def test_per_feature_box_and_sklearn_orientation_error():
    rng = np.random.default_rng(2)
    w = rng.normal(size=(3, 5)).astype(np.float32)
    with tempfile.TemporaryDirectory() as d:
        model = Path(d) / "m.json"
        low = np.array([0, -1, -2, -3, -4], np.float32)
        high = np.array([1, 2, 3, 4, 5.5], np.float32)
        rx.export_arrays([("h", w, np.zeros(3), "relu")], 5, low, high, path=model)
        doc = json.loads(model.read_text())
        assert doc["input"]["low"] == [0.0, -1.0, -2.0, -3.0, -4.0]
        assert doc["input"]["high"] == [1.0, 2.0, 3.0, 4.0, 5.5]
        # scikit-learn's coefs_ are [inputs, units]: passing them untransposed is refused.
        try:
            rx.export_arrays([("h", w.T, np.zeros(3), "relu")], 5, path=Path(d) / "bad.json")
        except rx.ExportError as e:
            msg = str(e)
            assert "layer 'h'" in msg and "3 columns" in msg and "input size is 5" in msg, msg
        else:
            raise AssertionError("untransposed weights were accepted")
        assert not (Path(d) / "bad.json").exists()


def expect_error(fragment, fn):
    try:
        fn()
    except rx.ExportError as e:
        assert fragment in str(e), f"{fragment!r} not in {e}"
        return
    raise AssertionError(f"no error; expected one containing {fragment!r}")


def test_bad_input_gives_clear_errors():
    w = np.ones((2, 3), np.float32)
    b = np.zeros(2, np.float32)
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "m.json"
        nan_w = w.copy()
        nan_w[1, 2] = np.nan
        expect_error("non-finite value nan at index [1, 2]",
                     lambda: rx.export_arrays([("h", nan_w, b, "relu")], 3, path=p))
        expect_error("softmax is allowed only in the last layer", lambda: rx.export_arrays(
            [("h", w, b, "softmax"), ("o", np.ones((1, 2)), [0.0], "identity")], 3, path=p))
        expect_error("unknown activation 'gelu'",
                     lambda: rx.export_arrays([("h", w, b, "gelu")], 3, path=p))
        expect_error("bias has 3 values", lambda: rx.export_arrays(
            [("h", w, np.zeros(3), "relu")], 3, path=p))
        expect_error("used twice", lambda: rx.export_arrays(
            [("h", w, b, "relu"), ("h", np.ones((1, 2)), [0.0], "identity")], 3, path=p))
        expect_error("low[1] = 2.0 is above high[1] = 1.0",
                     lambda: rx.export_arrays([("h", w, b, "relu")], 3, [0, 2, 0], 1.0, path=p))
        expect_error("3 labels but the last layer has 2 units", lambda: rx.export_arrays(
            [("h", w, b, "relu")], 3, labels=["a", "b", "c"], path=p))
        expect_error("4 x 4 x 1 = 16 but the input size is 3",
                     lambda: rx.export_arrays([("h", w, b, "relu")], 3, layout=(4, 4), path=p))
        expect_error("outside the folder", lambda: rx.export_arrays(
            [("h", w, b, "relu")], 3, path=p, safetensors_threshold=1,
            safetensors_file=Path(d).parent / "elsewhere.safetensors"))
        assert not p.exists(), "a failed export left a file behind"


def test_torch_sequential():
    try:
        import torch
        from torch import nn
    except Exception as e:  # ImportError, or a CUDA build without its libraries
        skip(f"torch does not import here: {type(e).__name__}: {e}")
    torch.manual_seed(0)
    net = nn.Sequential(
        nn.Flatten(),
        nn.Linear(12, 10),
        nn.ReLU(),
        nn.Dropout(0.1),
        nn.Linear(10, 8),
        nn.LeakyReLU(0.05),
        nn.Linear(10 - 2, 6, bias=False),
        nn.Tanh(),
        nn.Linear(6, 5),
        nn.Sigmoid(),
        nn.Linear(5, 3),
        nn.Softmax(dim=1),
    ).eval()
    rng = np.random.default_rng(3)
    x = rng.uniform(-1, 1, size=(30, 12)).astype(np.float32)
    with torch.no_grad():
        want = net(torch.from_numpy(x)).double().numpy()
    with tempfile.TemporaryDirectory() as d:
        model = Path(d) / "torch.json"
        rx.export_torch(net, path=model, layout=(3, 4), labels=["a", "b", "c"],
                        safetensors_threshold=80)
        doc = json.loads(model.read_text())
        assert [l["activation"] for l in doc["layers"]] == [
            "relu", "leaky_relu", "tanh", "sigmoid", "softmax"
        ]
        assert [l["name"] for l in doc["layers"]] == ["h1", "h2", "h3", "h4", "out"]
        assert doc["layers"][0]["weights"]["tensor"] == "h1.weight"  # 120 elements >= 80
        assert doc["layers"][2]["bias"] == [0.0] * 6  # Linear(bias=False)
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        rows = run_forward(model, probe)
        got = outputs_of(rows, ["a", "b", "c"])
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))
        bad = nn.Sequential(nn.Linear(4, 4), nn.GELU())
        expect_error("module 1 ('1', GELU) is not supported",
                     lambda: rx.export_torch(bad, path=Path(d) / "bad.json"))
        bad = nn.Sequential(nn.Linear(4, 4), nn.ReLU(), nn.BatchNorm1d(4))
        expect_error("module 2 ('2', BatchNorm1d): can only be folded when it directly follows a Linear",
                     lambda: rx.export_torch(bad, path=Path(d) / "bad.json"))
        assert not (Path(d) / "bad.json").exists()


def test_exported_files_validate_against_the_schema():
    """Every kind of exported file validates against assets/model-schema.json (JSON Schema
    draft 2020-12), checked with the `jsonschema` package when it is installed."""
    try:
        import jsonschema
    except ImportError:
        skip("jsonschema is not installed (pip install jsonschema)")
    schema = json.loads((REPO / "assets" / "model-schema.json").read_text())
    validator = jsonschema.Draft202012Validator(schema)
    rng = np.random.default_rng(4)
    layers = random_net(rng, [8, 6, 3], [("leaky_relu", 0.1), "softmax"])
    with tempfile.TemporaryDirectory() as d:
        paths = [
            rx.export_arrays(layers, 8, path=Path(d) / "a.json", layout=(2, 4),
                             labels=["x", "y", "z"], names=[f"n{i}" for i in range(8)],
                             units=["degC", "%", "A", "", "ppm", "mm/s", "1/day", "V"]),
            rx.export_arrays(layers, 8, np.zeros(8), np.arange(1, 9), path=Path(d) / "b.json",
                             safetensors_threshold=1, description="side file"),
            # receptor-model/2: every convolutional layer type, inline and in a side file.
            rx.export_arrays(conv_layers(rng), 126, layout=(7, 6, 3), path=Path(d) / "c.json",
                             labels=["a", "b", "c"], safetensors_threshold=None),
            rx.export_arrays(conv_layers(rng), 126, layout=(7, 6, 3), path=Path(d) / "d.json",
                             safetensors_threshold=20),
        ]
        assert json.loads(paths[2].read_text())["schema"] == "receptor-model/2"
        for p in paths:
            errors = sorted(validator.iter_errors(json.loads(p.read_text())), key=str)
            assert not errors, f"{p.name}: {[e.message for e in errors]}"
        # And the validator is not vacuous: a file without "schema" fails.
        bad = json.loads(paths[0].read_text())
        del bad["schema"]
        assert list(validator.iter_errors(bad)), "schema accepted a file without 'schema'"


def test_torch_through_onnx():
    """export_onnx: torch.onnx.export plus the box and labels in metadata_props; receptor
    reads the .onnx file directly (BatchNorm1d folded) and matches PyTorch's own outputs."""
    try:
        import torch
        from torch import nn
        import onnx  # noqa: F401
    except Exception as e:
        skip(f"torch or onnx does not import here: {type(e).__name__}: {e}")
    torch.manual_seed(1)
    net = nn.Sequential(nn.Linear(7, 9), nn.BatchNorm1d(9), nn.ReLU(), nn.Linear(9, 4), nn.Softmax(dim=1))
    with torch.no_grad():
        net[1].running_mean.copy_(torch.randn(9) * 0.5)
        net[1].running_var.copy_(torch.rand(9) + 0.5)
    net.eval()
    rng = np.random.default_rng(5)
    x = rng.uniform(0, 2, size=(25, 7)).astype(np.float32)
    with torch.no_grad():
        want = net(torch.from_numpy(x)).double().numpy()
    with tempfile.TemporaryDirectory() as d:
        units = ["degC", "%", "A", "", "ppm", "mm/s", "1/day"]
        model = rx.export_onnx(net, torch.zeros(1, 7), path=Path(d) / "net.onnx", low=0.0, high=2.0,
                               labels=["w", "x", "y", "z"], units=units)
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        proc = subprocess.run([receptor_bin(), "stats", str(model)], capture_output=True, text=True, timeout=120)
        assert proc.returncode == 0 and "default" not in proc.stderr, proc.stderr  # box from metadata
        got = outputs_of(run_forward(model, probe), ["w", "x", "y", "z"])
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))
        # receptor read the units from metadata_props: its own JSON of the model has them.
        assert converted_units(model, Path(d) / "conv.json") == units


def converted_units(model, out):
    """`receptor convert MODEL --out OUT`, then the ``input.units`` receptor wrote."""
    proc = subprocess.run([receptor_bin(), "convert", str(model), "--out", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return json.loads(out.read_text())["input"].get("units")


def test_units_are_written_and_read_back():
    """export_arrays(units=...) writes input.units; receptor reads them back (its convert
    writes the same list); a wrong count is refused naming both counts."""
    rng = np.random.default_rng(6)
    layers = random_net(rng, [3, 4, 2], ["relu", "identity"])
    units = ["degC", "%", "A"]
    with tempfile.TemporaryDirectory() as d:
        model = rx.export_arrays(layers, 3, path=Path(d) / "u.json", units=units,
                                 safetensors_threshold=None)
        assert json.loads(model.read_text())["input"]["units"] == units
        assert converted_units(model, Path(d) / "back.json") == units
        plain = rx.export_arrays(layers, 3, path=Path(d) / "p.json", safetensors_threshold=None)
        assert "units" not in json.loads(plain.read_text())["input"]
        try:
            rx.export_arrays(layers, 3, path=Path(d) / "bad.json", units=["degC"])
        except rx.ExportError as e:
            assert "1 units but the input size is 3" in str(e), e
        else:
            raise AssertionError("a wrong number of units was accepted")
        assert not (Path(d) / "bad.json").exists()


def conv_layers(rng):
    """A small CNN on a 7 x 6 x 3 input using every new layer type and field form."""
    def w(*shape):
        return rng.normal(0.0, 0.5, size=shape).astype(np.float32)

    return [
        {"name": "c1", "type": "conv2d", "weights": w(4, 3, 3, 2), "bias": w(4),
         "stride": [1, 2], "padding": [1, 0], "dilation": 1, "activation": "relu"},
        {"name": "p1", "type": "max_pool2d", "kernel": 2, "stride": 1, "padding": 1},
        {"name": "c2", "type": "conv2d", "weights": w(5, 4, 2, 2), "dilation": [2, 1],
         "activation": ("leaky_relu", 0.1)},
        {"name": "p2", "type": "avg_pool2d", "kernel": [2, 3], "stride": [2, 1], "padding": [1, 1]},
        {"name": "flat", "type": "flatten"},
        # Shapes by hand (PyTorch's floor formula, [channels, height, width]): input [3, 7, 6];
        # c1 (7 + 2 - 3) + 1 = 7, (6 - 2) // 2 + 1 = 3 -> [4, 7, 3]; p1 -> [4, 8, 4];
        # c2 (8 - 2 * 1 - 1) + 1 = 6, (4 - 1 - 1) + 1 = 3 -> [5, 6, 3];
        # p2 (6 + 2 - 2) // 2 + 1 = 4, (3 + 2 - 3) + 1 = 3 -> [5, 4, 3]; flatten -> 60.
        ("fc", w(3, 60), w(3), "softmax"),
    ]


def test_conv_arrays_match_numpy_forward():
    rng = np.random.default_rng(5)
    layers = conv_layers(rng)
    x = rng.uniform(-1.0, 1.0, size=(30, 7 * 6 * 3)).astype(np.float32)
    with tempfile.TemporaryDirectory() as d:
        model = Path(d) / "cnn.json"
        rx.export_arrays(layers, 7 * 6 * 3, layout=(7, 6, 3), labels=["a", "b", "c"], path=model,
                         safetensors_threshold=20)
        doc = json.loads(model.read_text())
        assert doc["schema"] == "receptor-model/2"
        c1, p1, c2, p2, flat, fc = doc["layers"]
        assert c1["stride"] == [1, 2] and c1["padding"] == [1, 0] and c1["dilation"] == 1
        assert c1["weights"] == {"safetensors": "cnn.safetensors", "tensor": "c1.weight"}
        assert c2["bias"] == [0.0] * 5  # no bias given: zeros
        assert p1 == {"name": "p1", "type": "max_pool2d", "kernel": 2, "stride": 1, "padding": 1}
        assert p2["kernel"] == [2, 3] and p2["stride"] == [2, 1]
        assert flat == {"name": "flat", "type": "flatten"}
        assert fc["labels"] == ["a", "b", "c"]
        want = np_forward_file(model, x)
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        rows = run_forward(model, probe)
        got = outputs_of(rows, ["a", "b", "c"])
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))


def test_conv_shape_errors_name_the_layer():
    rng = np.random.default_rng(6)
    good = conv_layers(rng)
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "m.json"

        def export(layers, layout=(7, 6, 3), size=126, **kw):
            return lambda: rx.export_arrays(layers, size, layout=layout, path=p, **kw)

        c2_wrong = dict(good[2], weights=np.zeros((5, 8, 2, 2), np.float32))
        expect_error("layer 'c2': weights expect 8 input channels but 'p1' gives 4",
                     export([good[0], good[1], c2_wrong]))
        expect_error("layer 'c1': weights expect 3 input channels but the input has 1",
                     export(good[:1], layout=(7, 18, 1)))
        expect_error("layer 'fc': a dense layer after a [5, 4, 3] map from 'p2' needs a flatten layer first",
                     export(good[:4] + good[5:]))
        expect_error("layer 'c1': a conv2d layer needs a spatial map",
                     export(good[:1], layout=None))
        big = dict(good[0], weights=np.zeros((4, 3, 10, 2), np.float32))
        expect_error("layer 'c1': the 10 x 2 kernel (dilation [1, 1]) is larger than the padded input 9 x 6",
                     export([big]))
        expect_error("layer 'c1': stride: must be at least 1, got 0", export([dict(good[0], stride=0)]))
        expect_error("layer 'c1': padding: must be at least 0, got [-1, 0]",
                     export([dict(good[0], padding=[-1, 0])]))
        expect_error("layer 'p1': the 9 x 9 pool gives an empty map on a [4, 7, 3] map from c1",
                     export([good[0], dict(good[1], kernel=9, padding=0)]))
        expect_error("layer 'p1': padding [2, 2] is more than half the kernel [2, 2]",
                     export([good[0], dict(good[1], padding=2)]))
        expect_error("layer 'f': flatten needs a spatial map but the input gives a vector of 126",
                     export([{"name": "f", "type": "flatten"}], layout=None))
        expect_error("labels: the last layer 'flat' is flatten, not dense",
                     export(good[:5], labels=["a"]))
        expect_error("layer 'c1': a conv2d layer has no field 'kernel'", export([dict(good[0], kernel=3)]))
        expect_error("layer 'c1': unknown layer type 'conv3d'", export([dict(good[0], type="conv3d")]))
        expect_error("layer 'c1': softmax is allowed only on a dense output layer",
                     export([dict(good[0], activation="softmax")]))
        assert not p.exists(), "a failed export left a file behind"
        # A global pool takes the whole map, whatever its size.
        rx.export_arrays(good[:3] + [{"name": "g", "type": "avg_pool2d", "kernel": "global"}], 126,
                         layout=(7, 6, 3), path=p)
        g = json.loads(p.read_text())["layers"][-1]
        assert (g["kernel"], g["stride"], g["padding"]) == ([6, 3], [6, 3], 0), g


def test_fold_batchnorm_matches_the_normalisation():
    """Folding against the batch-normalisation formula of PyTorch's documentation,
    y = (z - mean) / sqrt(var + eps) * gamma + beta, applied to the unfolded layer's output."""
    rng = np.random.default_rng(7)
    w = rng.normal(size=(4, 2, 3, 3))
    b = rng.normal(size=4)
    gamma, beta = rng.normal(size=4), rng.normal(size=4)
    mean, var = rng.normal(size=4), rng.uniform(0.1, 2.0, size=4)
    x = rng.normal(size=(5, 2, 6, 6))
    z = np_conv2d(x, w, b, 1, 1, 1)
    c = (None, slice(None), None, None)
    want = (z - mean[c]) / np.sqrt(var[c] + 1e-3) * gamma[c] + beta[c]
    w2, b2 = rx.fold_batchnorm(w, b, gamma, beta, mean, var, eps=1e-3)
    assert w2.dtype == np.float32 and w2.shape == w.shape and b2.shape == (4,)
    got = np_conv2d(x, w2.astype(np.float64), b2, 1, 1, 1)
    assert np.max(np.abs(got - want)) <= 1e-4 * max(1.0, np.max(np.abs(want))), np.max(np.abs(got - want))
    # No affine parameters and no bias: gamma 1, beta 0, b 0.
    w3, b3 = rx.fold_batchnorm(w, None, None, None, mean, var)
    assert np.allclose(b3, -mean / np.sqrt(var + 1e-5), atol=1e-6)
    expect_error("running_mean has shape (3,)", lambda: rx.fold_batchnorm(w, b, gamma, beta, mean[:3], var))


def _torch():
    try:
        import torch
        from torch import nn
    except Exception as e:  # ImportError, or a CUDA build without its libraries
        skip(f"torch does not import here: {type(e).__name__}: {e}")
    return torch, nn


def test_numpy_reference_agrees_with_torch_functional():
    """The numpy convolution and pooling used as references above against
    torch.nn.functional.conv2d / max_pool2d / avg_pool2d (CPU), so the references are not
    checked only against themselves."""
    torch, _ = _torch()
    import torch.nn.functional as F

    rng = np.random.default_rng(8)
    x = rng.normal(size=(2, 3, 9, 8))
    w = rng.normal(size=(4, 3, 3, 2))
    b = rng.normal(size=4)
    for stride, padding, dilation in [(1, 0, 1), ((2, 1), (1, 2), (1, 2)), (3, 1, 2)]:
        want = F.conv2d(torch.from_numpy(x), torch.from_numpy(w), torch.from_numpy(b),
                        stride=stride, padding=padding, dilation=dilation).numpy()
        got = np_conv2d(x, w, b, stride, padding, dilation)
        assert got.shape == want.shape and np.max(np.abs(got - want)) < 1e-10, (stride, padding, dilation)
    for kernel, stride, padding in [(2, 2, 0), ((3, 2), (1, 2), (1, 1)), (3, 2, 1)]:
        t = torch.from_numpy(x)
        want = F.max_pool2d(t, kernel, stride, padding).numpy()
        assert np.array_equal(np_pool(x, "max_pool2d", kernel, stride, padding), want)
        want = F.avg_pool2d(t, kernel, stride, padding).numpy()  # count_include_pad=True
        assert np.max(np.abs(np_pool(x, "avg_pool2d", kernel, stride, padding) - want)) < 1e-12


def test_torch_cnn_with_batchnorm():
    torch, nn = _torch()
    torch.manual_seed(1)
    net = nn.Sequential(
        nn.Conv2d(3, 6, 3, padding=1),
        nn.BatchNorm2d(6),
        nn.ReLU(),
        nn.MaxPool2d(2),
        nn.Conv2d(6, 8, (3, 2), stride=(1, 2), padding=(1, 0), bias=False),
        nn.MaxPool2d(2, stride=1),
        nn.LeakyReLU(0.1),  # after a max pool: moved onto the convolution (max commutes)
        nn.Dropout2d(0.2),
        nn.AvgPool2d(3, stride=2, padding=1),
        nn.Conv2d(8, 8, 3, padding="same", dilation=2),
        nn.Tanh(),
        nn.AdaptiveAvgPool2d(1),
        nn.Flatten(),
        nn.Linear(8, 6),
        nn.BatchNorm1d(6),
        nn.Sigmoid(),
        nn.Linear(6, 3),
        nn.Softmax(dim=1),
    )
    # Give the normalisations non-trivial running statistics and affine parameters, then
    # switch to inference.
    with torch.no_grad():
        for m in net.modules():
            if isinstance(m, (nn.BatchNorm1d, nn.BatchNorm2d)):
                m.running_mean.uniform_(-0.5, 0.5)
                m.running_var.uniform_(0.5, 2.0)
                m.weight.uniform_(0.5, 1.5)
                m.bias.uniform_(-0.3, 0.3)
    net.eval()
    rng = np.random.default_rng(9)
    x = rng.uniform(0.0, 1.0, size=(20, 12 * 16 * 3)).astype(np.float32)
    # receptor's input is channel last; the PyTorch module reads [N, C, H, W].
    xt = torch.from_numpy(x.reshape(20, 12, 16, 3).transpose(0, 3, 1, 2).copy())
    with torch.no_grad():
        want = net(xt).double().numpy()
    with tempfile.TemporaryDirectory() as d:
        model = Path(d) / "cnn.json"
        rx.export_torch(net, path=model, low=0.0, high=1.0, layout=(12, 16, 3), labels=["a", "b", "c"],
                        safetensors_threshold=100)
        doc = json.loads(model.read_text())
        assert doc["schema"] == "receptor-model/2"
        assert [(l["name"], l["type"]) for l in doc["layers"]] == [
            ("conv1", "conv2d"), ("pool1", "max_pool2d"), ("conv2", "conv2d"), ("pool2", "max_pool2d"),
            ("pool3", "avg_pool2d"), ("conv3", "conv2d"), ("pool4", "avg_pool2d"), ("flatten", "flatten"),
            ("h1", "dense"), ("out", "dense"),
        ]
        acts = [l.get("activation") for l in doc["layers"]]
        assert acts == ["relu", None, "leaky_relu", None, None, "tanh", None, None, "sigmoid", "softmax"]
        assert doc["layers"][5]["padding"] == 2  # "same" with a dilated 3 x 3 kernel
        # The global pool over conv3's map: input 12 x 16; conv1 12 x 16; pool1 6 x 8;
        # conv2 6 x (8 - 2) // 2 + 1 = 4; pool2 5 x 3; pool3 (5 + 2 - 3) // 2 + 1 = 3,
        # (3 + 2 - 3) // 2 + 1 = 2; conv3 ("same") 3 x 2.
        assert doc["layers"][6]["kernel"] == [3, 2]
        # The exported file, read back by the numpy reference, gives PyTorch's outputs ...
        ref = np_forward_file(model, x)
        assert np.max(np.abs(ref - want)) <= TOL, np.max(np.abs(ref - want))
        # ... and so does receptor itself.
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        got = outputs_of(run_forward(model, probe), ["a", "b", "c"])
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))
        for bad, fragment in [
            (nn.Sequential(nn.Conv2d(4, 4, 3, groups=2)), "module 0 ('0', Conv2d): groups=2 is not supported"),
            (nn.Sequential(nn.Conv2d(3, 4, 3), nn.Upsample(scale_factor=2)), "module 1 ('1', Upsample) is not supported"),
            (nn.Sequential(nn.Conv2d(3, 4, 3), nn.AvgPool2d(2), nn.ReLU()),
             "module 2 ('2', ReLU): an activation after avg_pool2d cannot be written"),
            (nn.Sequential(nn.Conv2d(3, 4, 3), nn.MaxPool2d(2, ceil_mode=True)), "ceil_mode=True is not supported"),
            (nn.Sequential(nn.Conv2d(3, 4, 2, padding="same")), "padding='same' with an even kernel"),
            (nn.Sequential(nn.Conv2d(3, 4, 3), nn.AdaptiveAvgPool2d(2)), "only output_size=1"),
            (nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm1d(4)),
             "module 1 ('1', BatchNorm1d): can only be folded when it directly follows a Linear"),
            (nn.Sequential(nn.Conv2d(3, 4, 3), nn.Flatten(), nn.Linear(8, 2)),
             "layer 'out': weights have 8 columns but 'flatten' gives 560 values"),
        ]:
            expect_error(fragment, lambda bad=bad: rx.export_torch(bad, path=Path(d) / "bad.json", layout=(12, 16, 3)))
        expect_error("the network starts with conv2d: pass layout=(height, width, channels)",
                     lambda: rx.export_torch(nn.Sequential(nn.Conv2d(3, 4, 3)), path=Path(d) / "bad.json"))
        assert not (Path(d) / "bad.json").exists()


def run_timeline(folder, *extra):
    """`receptor timeline FOLDER --per checkpoint --format json ...` -> the parsed JSON."""
    proc = subprocess.run(
        [receptor_bin(), "timeline", str(folder), "--per", "checkpoint", "--format", "json", *extra],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 0, f"receptor timeline failed ({proc.returncode}): {proc.stderr}"
    return json.loads(proc.stdout)


def test_checkpoint_writer_numpy_training_loop():
    """A numpy 'training loop' writing every 3 steps: the files, their "step" and their
    side-file tensors, then `receptor timeline` on the folder against numpy's own
    mean |w_t - w_(t-1)| between the written checkpoints."""
    from safetensors.numpy import load_file

    rng = np.random.default_rng(7)
    layers = random_net(rng, [5, 6, 3], ["relu", "softmax"])
    with tempfile.TemporaryDirectory() as d:
        run = Path(d) / "run"
        writer = rx.CheckpointWriter(run, every=3, low=0.0, high=1.0, name="toy")
        kept = {}
        for step in range(11):
            # One fake update per step (what an optimiser step would do).
            layers = [(n, w - 0.05 * rng.normal(size=w.shape).astype(np.float32), b, a)
                      for n, w, b, a in layers]
            if writer(layers, step) is not None:
                kept[step] = [w.copy() for _n, w, _b, _a in layers]
        assert sorted(kept) == [0, 3, 6, 9]
        assert [p.name for p in writer.written] == ["ckpt-0.json", "ckpt-3.json", "ckpt-6.json", "ckpt-9.json"]
        for step, ws in kept.items():
            doc = json.loads((run / f"ckpt-{step}.json").read_text())
            assert doc["step"] == step
            assert doc["layers"][0]["weights"] == {"safetensors": f"ckpt-{step}.safetensors", "tensor": "fc1.weight"}
            assert doc["layers"][0]["bias"]["tensor"] == "fc1.bias"  # every tensor in the side file
            side = load_file(str(run / f"ckpt-{step}.safetensors"))
            assert np.array_equal(side["fc1.weight"], ws[0]) and np.array_equal(side["fc2.weight"], ws[1])
        out = run_timeline(run, "--samples", "50")
        assert out["key"] == "step"
        rows = out["rows"]
        assert [r["step"] for r in rows] == [0, 3, 6, 9]  # one hidden layer: one row per checkpoint
        assert rows[0]["mean_abs_update"] is None
        for prev, cur, r in zip([0, 3, 6], [3, 6, 9], rows[1:]):
            want = float(np.mean(np.abs(kept[cur][0].astype(np.float64) - kept[prev][0])))
            assert abs(r["mean_abs_update"] - want) <= 1e-12, (r["mean_abs_update"], want)
        # save() writes whatever the step; bad arguments are refused before anything is written.
        assert writer.save(layers, 10).name == "ckpt-10.json"
        expect_error("every must be a whole number of steps from 1", lambda: rx.CheckpointWriter(run, every=0))
        expect_error("step must be a whole number from 0", lambda: writer(layers, -3))
        expect_error("step must be a whole number from 0", lambda: writer.save(layers, True))
        assert not (run / "ckpt--3.json").exists()


def test_checkpoint_writer_torch_training_loop():
    """The PyTorch path: an nn.Sequential trained by SGD, written every 2 steps; each side
    file holds the module's weights at that step, and receptor's forward pass on the last
    checkpoint matches the module's."""
    try:
        import torch
        from torch import nn
    except Exception as e:  # ImportError, or a CUDA build without its libraries
        skip(f"torch does not import here: {type(e).__name__}: {e}")
    from safetensors.numpy import load_file

    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 3), nn.Softmax(dim=1))
    opt = torch.optim.SGD(net.parameters(), lr=0.5)
    rng = np.random.default_rng(8)
    x = torch.from_numpy(rng.uniform(0, 1, size=(64, 4)).astype(np.float32))
    y = torch.from_numpy(rng.integers(0, 3, size=64))
    with tempfile.TemporaryDirectory() as d:
        run = Path(d) / "run"
        writer = rx.CheckpointWriter(run, every=2, low=0.0, high=1.0)
        kept = {}
        for step in range(1, 7):
            loss = nn.functional.nll_loss(torch.log(net(x)), y)
            opt.zero_grad()
            loss.backward()
            opt.step()
            if writer(net, step):
                kept[step] = net[0].weight.detach().numpy().copy()
        assert sorted(kept) == [2, 4, 6]
        for step, w in kept.items():
            side = load_file(str(run / f"ckpt-{step}.safetensors"))
            assert np.array_equal(side["h1.weight"], w)
            assert json.loads((run / f"ckpt-{step}.json").read_text())["step"] == step
        assert not np.array_equal(kept[2], kept[6]), "training changed the weights"
        probe = Path(d) / "probe.csv"
        write_probe(probe, x.numpy())
        rows = run_forward(run / "ckpt-6.json", probe)
        with torch.no_grad():
            want = net(x).double().numpy()
        got = outputs_of(rows, ["out0", "out1", "out2"])
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))
        out = run_timeline(run, "--samples", "50")
        assert [r["step"] for r in out["rows"]] == [2, 4, 6]


TESTS = [
    test_inline_model_matches_numpy_forward,
    test_units_are_written_and_read_back,
    test_large_tensors_go_to_safetensors_side_file,
    test_per_feature_box_and_sklearn_orientation_error,
    test_bad_input_gives_clear_errors,
    test_exported_files_validate_against_the_schema,
    test_torch_sequential,
    test_torch_through_onnx,
    test_conv_arrays_match_numpy_forward,
    test_conv_shape_errors_name_the_layer,
    test_fold_batchnorm_matches_the_normalisation,
    test_numpy_reference_agrees_with_torch_functional,
    test_torch_cnn_with_batchnorm,
    test_checkpoint_writer_numpy_training_loop,
    test_checkpoint_writer_torch_training_loop,
]


def main():
    passed = failed = skipped = 0
    for t in TESTS:
        try:
            t()
        except Skip as e:
            skipped += 1
            print(f"SKIP {t.__name__}: {e}")
        except Exception as e:  # noqa: BLE001 - report every failure and go on
            failed += 1
            print(f"FAIL {t.__name__}: {type(e).__name__}: {e}")
        else:
            passed += 1
            print(f"ok   {t.__name__}")
    print(f"{passed} passed, {failed} failed, {skipped} skipped")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
