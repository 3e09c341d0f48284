#!/usr/bin/env python3
"""Tests of tools/receptor_export.py: export with numpy, then run the real `receptor forward`
binary on the exported model and compare its output with a numpy forward pass.

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
        bad = nn.Sequential(nn.Linear(4, 4), nn.BatchNorm1d(4))
        expect_error("module 1 ('1', BatchNorm1d) is not supported",
                     lambda: rx.export_torch(bad, path=Path(d) / "bad.json"))


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
                             labels=["x", "y", "z"], names=[f"n{i}" for i in range(8)]),
            rx.export_arrays(layers, 8, np.zeros(8), np.arange(1, 9), path=Path(d) / "b.json",
                             safetensors_threshold=1, description="side file"),
        ]
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
        model = rx.export_onnx(net, torch.zeros(1, 7), path=Path(d) / "net.onnx", low=0.0, high=2.0,
                               labels=["w", "x", "y", "z"])
        probe = Path(d) / "probe.csv"
        write_probe(probe, x)
        proc = subprocess.run([receptor_bin(), "stats", str(model)], capture_output=True, text=True, timeout=120)
        assert proc.returncode == 0 and "default" not in proc.stderr, proc.stderr  # box from metadata
        got = outputs_of(run_forward(model, probe), ["w", "x", "y", "z"])
        assert np.max(np.abs(got - want)) <= TOL, np.max(np.abs(got - want))


TESTS = [
    test_inline_model_matches_numpy_forward,
    test_large_tensors_go_to_safetensors_side_file,
    test_per_feature_box_and_sklearn_orientation_error,
    test_bad_input_gives_clear_errors,
    test_exported_files_validate_against_the_schema,
    test_torch_sequential,
    test_torch_through_onnx,
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
