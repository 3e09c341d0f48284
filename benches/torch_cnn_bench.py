#!/usr/bin/env python3
"""The PyTorch side of receptor's `screen_cnn` benchmark: the same work as benches/core.rs
on the same files, PyTorch on the CPU with the same number of threads.

    RECEPTOR_BENCH_DIR=DIR RECEPTOR_BENCH_ONLY=screen_cnn RECEPTOR_BENCH_JSON=DIR/rust.json \\
        cargo bench --bench core
    python3 benches/torch_cnn_bench.py DIR --threads 2 --rust DIR/rust.json

DIR holds cnn.json (our receptor-model/2 file: 32 x 32 x 3 input; conv 3x3 32, relu, max
pool 2, conv 3x3 64, relu, max pool 2, flatten, dense 128, relu, dense 10) and cnn_probe.npy
(10 000 x 3072 float32, receptor's input layout: row-major, channel last).

Measured (median wall time of several runs after one untimed warm-up), the work of
`receptor screen`:
  - interval bounds of every hidden layer over the input box (float64): conv2d of the box
    ends with the positive and negative parts of the weights, max pooling of the ends,
    the dense layer the same way;
  - np.load of the probe, then per chunk of 4096 rows: the forward pass (float32,
    torch.nn.functional.conv2d / max_pool2d / linear) and, per channel of each hidden
    layer, the samples where it is active at one position or more, the count of positive
    values, the sum and the maximum of the activation.

Needs torch and numpy. Tested with torch 2.15.0 (CPU) and numpy 2.4.6.
"""

import argparse
import json
import statistics
import time
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

CHUNK = 4096


def load(path):
    m = json.loads(Path(path).read_text())
    layers = []
    for l in m["layers"]:
        d = dict(l)
        if "weights" in l:
            d["w"] = torch.tensor(np.asarray(l["weights"], dtype=np.float32))
            d["b"] = torch.tensor(np.asarray(l.get("bias", [0.0] * len(l["weights"])), dtype=np.float32))
        layers.append(d)
    lay = m["input"]["layout"]
    return layers, (lay["channels"], lay["height"], lay["width"]), m["input"]


def pre(l, x):
    t = l["type"]
    if t == "conv2d":
        return F.conv2d(x, l["w"].to(x.dtype), l["b"].to(x.dtype), stride=l.get("stride", 1), padding=l.get("padding", 0))
    if t == "max_pool2d":
        k = l["kernel"]
        return F.max_pool2d(x, k, stride=l.get("stride", k))
    if t == "flatten":
        return torch.flatten(x, 1)
    return F.linear(x, l["w"].to(x.dtype), l["b"].to(x.dtype))


def bounds(layers, chw, inp):
    c, h, w = chw
    lo = torch.full((1, c, h, w), float(inp["low"]), dtype=torch.float64)
    hi = torch.full((1, c, h, w), float(inp["high"]), dtype=torch.float64)
    out = []
    for l in layers[:-1]:
        if "w" in l:
            wt = l["w"].double()
            wp, wn = wt.clamp(min=0), wt.clamp(max=0)
            b = l["b"].double()
            if l["type"] == "conv2d":
                kw = dict(stride=l.get("stride", 1), padding=l.get("padding", 0))
                zu = F.conv2d(hi, wp, b, **kw) + F.conv2d(lo, wn, None, **kw)
                zl = F.conv2d(lo, wp, b, **kw) + F.conv2d(hi, wn, None, **kw)
            else:
                zu = F.linear(hi, wp, b) + F.linear(lo, wn)
                zl = F.linear(lo, wp, b) + F.linear(hi, wn)
            out.append(zu)
            lo, hi = F.relu(zl), F.relu(zu)
        else:
            lo, hi = pre(l, lo), pre(l, hi)
    return out


def screen(layers, chw, inp, probe_path):
    ub = bounds(layers, chw, inp)
    x_all = np.load(probe_path)
    c, h, w = chw
    hidden = [i for i, l in enumerate(layers[:-1]) if "w" in l]
    acc = {i: None for i in hidden}
    for start in range(0, x_all.shape[0], CHUNK):
        x = torch.from_numpy(x_all[start:start + CHUNK]).view(-1, h, w, c).permute(0, 3, 1, 2).contiguous()
        for i, l in enumerate(layers[:-1]):
            z = pre(l, x)
            if i in hidden:
                a = F.relu(z)
                zf = z.reshape(z.shape[0], z.shape[1], -1)
                af = a.reshape(a.shape[0], a.shape[1], -1)
                pos = zf > 0
                stats = torch.stack([
                    pos.any(dim=2).sum(dim=0, dtype=torch.float64),
                    pos.sum(dim=(0, 2), dtype=torch.float64),
                    af.sum(dim=(0, 2), dtype=torch.float64),
                    af.amax(dim=(0, 2)).double(),
                ])
                if acc[i] is None:
                    acc[i] = stats
                else:
                    acc[i][:3] += stats[:3]
                    acc[i][3] = torch.maximum(acc[i][3], stats[3])
                x = a
            else:
                x = z
    return ub, acc


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("dir")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--rust", help="the JSON written by the Rust bench (RECEPTOR_BENCH_JSON)")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    d = Path(args.dir)
    layers, chw, inp = load(d / "cnn.json")
    with torch.no_grad():
        screen(layers, chw, inp, d / "cnn_probe.npy")
        times = []
        for _ in range(args.runs):
            t = time.perf_counter()
            screen(layers, chw, inp, d / "cnn_probe.npy")
            times.append(time.perf_counter() - t)
    med = statistics.median(times)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads")
    print(f"screen_cnn (PyTorch): median {med:.4f} s, min {min(times):.4f} s, runs {len(times)}")
    if args.rust:
        r = json.loads(Path(args.rust).read_text())["results"]["screen_cnn"]["median_s"]
        print(f"screen_cnn: receptor {r:.4f} s / PyTorch {med:.4f} s = {r / med:.2f}")


if __name__ == "__main__":
    main()
