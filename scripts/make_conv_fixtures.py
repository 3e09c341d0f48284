#!/usr/bin/env python3
"""Generate the convolution fixtures in tests/fixtures/conv/ with PyTorch (CPU).

The Rust test tests/conv_reference.rs loads these models through receptor's own importer
and compares receptor's forward pass (every layer), input gradients and first-layer
interval bounds with the numbers written here by PyTorch:
  - forward: torch.nn.functional.conv2d / max_pool2d / avg_pool2d (count_include_pad=True,
    ceil_mode=False, PyTorch's defaults) / torch.flatten / linear and the activations;
  - gradients: torch.autograd of one pre-activation value with respect to the input;
  - first-layer bounds: the closed form of an affine map's range over a box,
    b + W+ * high + W- * low (and the reverse for the lower bound), evaluated with
    torch.nn.functional.conv2d on the positive and negative parts of the weights
    (zero padding contributes exactly 0).

Generated with (the versions actually used are also written to VERSIONS.txt):
    Python 3.11, torch 2.15.0 (CPU), numpy 2.4.6
Install:  pip install torch numpy
Run from the repository root:  python3 scripts/make_conv_fixtures.py

Weights, biases, the box and the inputs are rounded to float32 first; PyTorch then computes
in float64 on exactly those values, so what remains is receptor's float32 arithmetic.

Layouts: receptor's input is row-major with the channel last (x[(y W + x) C + c]); PyTorch's
is [C, H, W]. The script converts inputs and gradients; maps between layers are written in
PyTorch's order, which is receptor's too.

Per model NAME:
  NAME.json            the model in our schema "receptor-model/2" (inline weights)
  NAME_probe.csv       the same inputs as a probe file (one row per sample, H W C columns)
  NAME_expected.json   inputs [samples, H W C], every layer's pre-activations
                       [samples, C H W], the output, gradients of chosen values, and the
                       first layer's exact bounds
"""

import json
import platform
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

OUT = Path(__file__).resolve().parent.parent / "tests" / "fixtures" / "conv"
SAMPLES = 12


def f32(a):
    return np.asarray(a, dtype=np.float32).astype(np.float64)


def short(x):
    """The shortest decimal that parses back to the same float32."""
    return float(str(np.float32(x)))


def nested(a):
    a = np.asarray(a, dtype=np.float32)
    if a.ndim == 0:
        return short(a)
    return [nested(v) for v in a]


def act(name, z, alpha=0.01):
    if name == "relu":
        return F.relu(z)
    if name == "leaky_relu":
        return F.leaky_relu(z, alpha)
    if name == "tanh":
        return torch.tanh(z)
    if name == "sigmoid":
        return torch.sigmoid(z)
    if name == "softmax":
        return torch.softmax(z, dim=-1)
    return z


def make(rng, spec):
    """Random float32 weights for each layer of `spec`, shapes in PyTorch's orientation."""
    layers = []
    for l in spec["layers"]:
        l = dict(l)
        if l["type"] == "conv2d":
            o, i, kh, kw = l["shape"]
            l["w"] = f32(rng.uniform(-0.8, 0.8, size=(o, i, kh, kw)))
            l["b"] = f32(rng.uniform(-0.3, 0.3, size=o))
        elif l["type"] == "dense":
            o, i = l["shape"]
            l["w"] = f32(rng.uniform(-0.6, 0.6, size=(o, i)))
            l["b"] = f32(rng.uniform(-0.2, 0.2, size=o))
        layers.append(l)
    return layers


def pair(v):
    return v if isinstance(v, list) else [v, v]


def run_layer(l, x):
    """Pre-activation of one layer (float64), x in PyTorch's layout."""
    t = l["type"]
    if t == "conv2d":
        return F.conv2d(x, torch.tensor(l["w"]), torch.tensor(l["b"]),
                        stride=pair(l.get("stride", 1)), padding=pair(l.get("padding", 0)),
                        dilation=pair(l.get("dilation", 1)))
    if t == "max_pool2d":
        k = pair(l["kernel"])
        return F.max_pool2d(x, k, stride=pair(l.get("stride", k)), padding=pair(l.get("padding", 0)))
    if t == "avg_pool2d":
        k = pair(l["kernel"])
        return F.avg_pool2d(x, k, stride=pair(l.get("stride", k)), padding=pair(l.get("padding", 0)),
                            count_include_pad=True, ceil_mode=False)
    if t == "flatten":
        return torch.flatten(x, 1)
    if t == "dense":
        return F.linear(x, torch.tensor(l["w"]), torch.tensor(l["b"]))
    raise ValueError(t)


def forward(layers, x):
    pres = []
    for l in layers:
        z = run_layer(l, x)
        pres.append(z)
        x = act(l.get("activation", "identity"), z, l.get("alpha", 0.01))
    return pres, x


def model_json(name, spec, layers):
    h, w, c = spec["input"]
    out = []
    for l in layers:
        d = {"name": l["name"], "type": l["type"]}
        for key in ("kernel", "stride", "padding", "dilation", "alpha"):
            if key in l:
                d[key] = l[key]
        if l["type"] in ("conv2d", "dense"):
            d["activation"] = l["activation"]
            d["weights"] = nested(l["w"])
            d["bias"] = nested(l["b"])
        out.append(d)
    return {
        "schema": "receptor-model/2",
        "name": name,
        "description": "convolution fixture made by scripts/make_conv_fixtures.py with PyTorch",
        "input": {"size": h * w * c, "layout": {"kind": "image", "height": h, "width": w, "channels": c},
                  "low": spec["low"], "high": spec["high"]},
        "layers": out,
    }


def to_hwc(x):
    """[N, C, H, W] -> [N, H W C] (receptor's input order)."""
    return x.permute(0, 2, 3, 1).reshape(x.shape[0], -1)


def first_layer_bounds(l, spec):
    """Exact range of the first layer's pre-activations over the box (closed form)."""
    h, w, c = spec["input"]
    lo = torch.full((1, c, h, w), float(np.float32(spec["low"])), dtype=torch.float64)
    hi = torch.full((1, c, h, w), float(np.float32(spec["high"])), dtype=torch.float64)
    wt = torch.tensor(l["w"])
    wp, wn = wt.clamp(min=0), wt.clamp(max=0)
    kw = dict(stride=pair(l.get("stride", 1)), padding=pair(l.get("padding", 0)),
              dilation=pair(l.get("dilation", 1)))
    b = torch.tensor(l["b"])
    up = F.conv2d(hi, wp, b, **kw) + F.conv2d(lo, wn, None, **kw)
    dn = F.conv2d(lo, wp, b, **kw) + F.conv2d(hi, wn, None, **kw)
    return dn.flatten().tolist(), up.flatten().tolist()


SPECS = {
    # Colour input, both poolings (padded average), stride/padding pairs, leaky ReLU.
    "cnn_rgb": {
        "input": [9, 8, 3], "low": -1.0, "high": 1.0,
        "layers": [
            {"name": "c1", "type": "conv2d", "shape": [4, 3, 3, 3], "padding": 1, "activation": "relu"},
            {"name": "p1", "type": "max_pool2d", "kernel": 2},
            {"name": "c2", "type": "conv2d", "shape": [5, 4, 3, 2], "stride": [1, 2], "padding": [1, 0],
             "activation": "leaky_relu", "alpha": 0.1},
            {"name": "p2", "type": "avg_pool2d", "kernel": 2, "stride": 1, "padding": 1},
            {"name": "flat", "type": "flatten"},
            {"name": "out", "type": "dense", "shape": [3, 75], "activation": "softmax"},
        ],
        "grads": [["c1", [1, 4, 3]], ["c2", [2, 1, 1]], ["c2", [4, 3, 0]], ["out", 1]],
    },
    # Grey input, dilation and stride, tanh and sigmoid, a 1 x 1 map before flatten.
    "cnn_grey_dilated": {
        "input": [12, 12, 1], "low": 0.0, "high": 1.0,
        "layers": [
            {"name": "c1", "type": "conv2d", "shape": [3, 1, 3, 3], "stride": 2, "dilation": 2,
             "activation": "tanh"},
            {"name": "p1", "type": "avg_pool2d", "kernel": 2},
            {"name": "c2", "type": "conv2d", "shape": [2, 3, 2, 2], "activation": "sigmoid"},
            {"name": "flat", "type": "flatten"},
            {"name": "out", "type": "dense", "shape": [2, 2], "activation": "identity"},
        ],
        "grads": [["c1", [0, 2, 1]], ["c2", [1, 0, 0]], ["out", 0]],
    },
    # Flatten straight on a colour input: PyTorch's channel-first order, not the input's.
    "cnn_flatten_first": {
        "input": [4, 5, 3], "low": -0.5, "high": 0.5,
        "layers": [
            {"name": "flat", "type": "flatten"},
            {"name": "h", "type": "dense", "shape": [4, 60], "activation": "relu"},
            {"name": "out", "type": "dense", "shape": [2, 4], "activation": "identity"},
        ],
        "grads": [["h", 2], ["out", 1]],
    },
}


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    torch.set_default_dtype(torch.float64)
    for seed, (name, spec) in enumerate(SPECS.items()):
        rng = np.random.default_rng(1000 + seed)
        layers = make(rng, spec)
        h, w, c = spec["input"]
        lo, hi = float(np.float32(spec["low"])), float(np.float32(spec["high"]))
        x = torch.tensor(f32(rng.uniform(lo, hi, size=(SAMPLES, c, h, w))))
        pres, out = forward(layers, x)
        names = [l["name"] for l in layers]
        grads = []
        for lname, where in spec["grads"]:
            li = names.index(lname)
            for s in (0, 5):
                xs = x[s:s + 1].clone().requires_grad_(True)
                p, _ = forward(layers[:li + 1], xs)
                z = p[li][0]
                z = z[tuple(where)] if isinstance(where, list) else z[where]
                z.backward()
                flat_index = (int(np.ravel_multi_index(where, p[li].shape[1:]))
                              if isinstance(where, list) else where)
                grads.append({"layer": lname, "index": flat_index, "sample": s, "z": float(z.detach()),
                              "grad": to_hwc(xs.grad).flatten().tolist()})
        dn, up = first_layer_bounds(layers[0], spec) if layers[0]["type"] == "conv2d" else (None, None)
        expected = {
            "versions": {"python": platform.python_version(), "torch": torch.__version__,
                         "numpy": np.__version__},
            "inputs": to_hwc(x).tolist(),
            "pre": {l["name"]: p.reshape(SAMPLES, -1).tolist() for l, p in zip(layers, pres)},
            "output": out.tolist(),
            "grads": grads,
            "first_lower": dn,
            "first_upper": up,
        }
        (OUT / f"{name}.json").write_text(json.dumps(model_json(name, spec, layers)) + "\n")
        (OUT / f"{name}_expected.json").write_text(json.dumps(expected) + "\n")
        rows = to_hwc(x).numpy().astype(np.float32)
        lines = [",".join(f"x{i}" for i in range(rows.shape[1]))]
        lines += [",".join(str(v) for v in r) for r in rows]
        (OUT / f"{name}_probe.csv").write_text("\n".join(lines) + "\n")
    (OUT / "VERSIONS.txt").write_text(
        "Made by scripts/make_conv_fixtures.py with PyTorch (CPU, float64 on float32-rounded values)\n"
        f"python {platform.python_version()}\ntorch {torch.__version__}\nnumpy {np.__version__}\n")


if __name__ == "__main__":
    main()
