#!/usr/bin/env python3
"""The numpy side of receptor's core benchmarks: the same work as benches/core.rs on the
same files, so both can run side by side on one machine.

    RECEPTOR_BENCH_DIR=DIR RECEPTOR_BENCH_JSON=DIR/rust.json cargo bench --bench core
    env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE \\
        python3 benches/numpy_bench.py DIR --rust DIR/rust.json [--json DIR/numpy.json]

DIR holds the files the Rust bench wrote: model.json (inline tensors, ~60 MB),
model_st.json + model.safetensors, probe.npy (10 000 x 784 float32).

Measured (median wall time of several runs, after one untimed warm-up):
  load_json             json.load of model.json + np.asarray(float32) of every tensor
  load_safetensors      json.load of model_st.json + safetensors.numpy.load_file
  read_safetensors_file reading the .safetensors file's bytes (page cache)
  screen                interval bounds of every layer (float64) and, over the probe read
                        from probe.npy in chunks, per hidden unit: active fraction, mean and
                        max of the activation (one GEMM per layer per chunk)
  prefer_all            projected gradient ascent for all 2048 units of layer h2 at once:
                        per step one GEMM per layer forward (below the target layer, the
                        target layer evaluated as one gathered row per sample) and one GEMM
                        per layer backward, the same update rule as src/analysis/prefer.rs

With --rust, prints the ratios Rust time / numpy time. The BLAS that numpy uses is reported
through threadpoolctl. On some machines OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE are set (for old
OpenBLAS builds) and slow a current numpy: unset both for this command only, as above.

Needs numpy, safetensors and (for the BLAS report) threadpoolctl.
"""

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

import numpy as np

PREFER_LAYER = 1  # h2, the second hidden layer
PREFER_STEPS = 100
CHUNK_ROWS = 4096  # receptor's ScreenOptions::default().chunk_rows (probe::DEFAULT_CHUNK_ROWS)
RARE = 0.01


def load_json_model(path):
    """json.load + numpy conversion: the Python baseline for loading the inline model."""
    with open(path, "rb") as fh:
        doc = json.load(fh)
    layers = []
    for l in doc["layers"]:
        w = np.asarray(l["weights"], dtype=np.float32)
        b = np.asarray(l["bias"], dtype=np.float32)
        layers.append((l["name"], l["activation"], w, b))
    inp = doc["input"]
    size = inp["size"]
    low = np.broadcast_to(np.asarray(inp.get("low", -1.0), np.float32), (size,)).copy()
    high = np.broadcast_to(np.asarray(inp.get("high", 1.0), np.float32), (size,)).copy()
    return layers, low, high


def load_safetensors_model(path):
    from safetensors.numpy import load_file

    path = Path(path)
    with open(path, "rb") as fh:
        doc = json.load(fh)
    files = {}
    layers = []
    for l in doc["layers"]:
        ref_w, ref_b = l["weights"], l["bias"]
        for ref in (ref_w, ref_b):
            f = ref["safetensors"]
            if f not in files:
                files[f] = load_file(str(path.parent / f))
        w = files[ref_w["safetensors"]][ref_w["tensor"]]
        b = files[ref_b["safetensors"]][ref_b["tensor"]]
        layers.append((l["name"], l["activation"], w, b))
    return layers


def relu(z):
    return np.maximum(z, 0.0, out=z)


def interval_bounds(layers, low, high):
    """Plain interval bound propagation (Gowal et al. 2018) in float64, as receptor's
    analysis::bounds does (there per unit with min/max terms; here in centre/radius form)."""
    lo, hi = low.astype(np.float64), high.astype(np.float64)
    uppers = []
    for _name, act, w, b in layers:
        w64 = w.astype(np.float64)
        mid, rad = (hi + lo) / 2, (hi - lo) / 2
        zm = w64 @ mid + b
        zr = np.abs(w64) @ rad
        zl, zh = zm - zr, zm + zr
        uppers.append(zh)
        if act == "relu":
            lo, hi = np.maximum(zl, 0), np.maximum(zh, 0)
        else:
            lo, hi = zl, zh
    return uppers


def screen(layers, low, high, probe_path):
    """The work of `receptor screen` on a ReLU network: bounds, then streamed statistics."""
    uppers = interval_bounds(layers, low, high)
    hidden = layers[:-1]
    x_all = np.load(probe_path, mmap_mode="r")
    n = x_all.shape[0]
    active = [np.zeros(w.shape[0], np.int64) for _, _, w, _ in hidden]
    total = [np.zeros(w.shape[0], np.float64) for _, _, w, _ in hidden]
    peak = [np.full(w.shape[0], -np.inf, np.float32) for _, _, w, _ in hidden]
    for start in range(0, n, CHUNK_ROWS):
        a = np.ascontiguousarray(x_all[start : start + CHUNK_ROWS], dtype=np.float32)
        for li, (_name, _act, w, b) in enumerate(hidden):
            z = a @ w.T
            z += b
            if not np.isfinite(z).all():  # receptor reports non-finite units
                raise FloatingPointError("non-finite pre-activation")
            active[li] += np.count_nonzero(z > 0, axis=0)
            a = relu(z)
            total[li] += a.sum(axis=0, dtype=np.float64)
            np.maximum(peak[li], a.max(axis=0), out=peak[li])
    rows = []
    for li in range(len(hidden)):
        frac = active[li] / n
        status = np.where(
            uppers[li] <= 0,
            "dead_proven",
            np.where(
                frac == 0,
                "dead_on_probe",
                np.where(frac < RARE, "rarely_active", np.where(frac == 1, "always_active", "ok")),
            ),
        )
        rows.append((frac, total[li] / n, peak[li], uppers[li], status))
    return rows


def prefer(layers, low, high, layer, units, steps, restarts, seed):
    """Batched projected gradient ascent on the pre-activation of `units` of `layer`.

    Mirrors src/analysis/prefer.rs (see ALGORITHM below): batch = units x restarts, start 0
    at the box centre, others uniform in the box; per step the gradient of every row's own
    unit by one forward GEMM per layer below the target, a gathered dot product for the
    target layer, and one backward GEMM per layer; then the update and the projection.
    """
    return ALGORITHM(layers, low, high, layer, units, steps, restarts, seed)


def _gradient(layers, layer, rows_unit, x):
    """z of unit rows_unit[b] of `layer` at x[b], and dz/dx: ([B], [B, inputs]).

    ReLU hidden layers (the benchmark network): f'(z) = [z > 0] = [relu(z) > 0], so only the
    activations are kept for the backward pass."""
    acts = []
    a = x
    for _name, _act, w, b in layers[:layer]:
        z = a @ w.T
        z += b
        a = np.maximum(z, 0.0, out=z)
        acts.append(a)
    wt = layers[layer][2].take(rows_unit, axis=0)  # [B, units below]: each row's unit's weights
    z_target = np.einsum("ij,ij->i", a, wt) + layers[layer][3][rows_unit]
    delta = np.multiply(wt, acts[-1] > 0, out=wt)
    for l in range(layer - 1, 0, -1):
        delta = delta @ layers[l][2]
        delta *= acts[l - 1] > 0
    grad = delta @ layers[0][2]
    return z_target, grad


# Step rule of src/analysis/prefer.rs: Adam (Kingma & Ba 2015, Algorithm 1) with a step of
# lr_t x (high - low) per input, lr_t cosine-decayed from 0.05 to 0.0005, then clamping.
BETA1, BETA2 = np.float32(0.9), np.float32(0.999)
LR_START, LR_END = 0.05, 0.0005


def _stuck(xa, g, ma, low, high, width):
    """Rows where no later step can move the point (src/analysis/prefer.rs `stuck`): every
    coordinate has zero gradient and momentum, or sits on the bound both push towards.
    Evaluated on the first coordinate for all rows, then fully only for the candidates (the
    same answer, without a full pass over the batch every step)."""

    def cond(xs, gs, ms, lo, hi, wd):
        return (
            (wd <= 0)
            | ((gs == 0) & (ms == 0))
            | ((xs >= hi) & (gs >= 0) & (ms >= 0))
            | ((xs <= lo) & (gs <= 0) & (ms <= 0))
        )

    cand = cond(xa[:, 0], g[:, 0], ma[:, 0], low[0], high[0], width[0])
    out = np.zeros(xa.shape[0], bool)
    ci = np.flatnonzero(cand)
    if ci.size:
        out[ci] = np.all(cond(xa[ci], g[ci], ma[ci], low, high, width), axis=1)
    return out


def _prefer_adam(layers, low, high, layer, units, steps, restarts, seed):
    n = low.size
    width = (high - low).astype(np.float32)
    rows = units.size * restarts
    centre = (0.5 * (low + high)).astype(np.float32)
    x = np.empty((rows, n), np.float32)
    x[:] = centre
    rnd = (np.arange(rows) % restarts) != 0  # start 0 of each unit is the centre
    if rnd.any():
        rng = np.random.default_rng(seed)
        x[rnd] = rng.uniform(low, high, size=(int(rnd.sum()), n)).astype(np.float32)
    row_unit = np.repeat(units, restarts)
    m = np.zeros_like(x)
    v = np.zeros_like(x)
    best_x = x.copy()
    best_obj = np.full(rows, -np.inf)
    steps_run = np.zeros(rows, np.int64)
    active = np.ones(rows, bool)
    nonfinite = np.zeros(rows, bool)
    one = np.float32(1)
    for t in range(steps + 1):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        # While every row moves, work on the arrays themselves instead of gathered copies.
        full = idx.size == rows
        xa = x if full else x[idx]
        z, g = _gradient(layers, layer, row_unit[idx], xa)
        frac = 0.0 if steps <= 1 else t / (steps - 1)
        lr = np.float32(LR_END + (LR_START - LR_END) * 0.5 * (1.0 + np.cos(np.pi * frac)))
        bc1 = one - BETA1 ** (t + 1)
        bc2 = one - BETA2 ** (t + 1)
        bad = ~np.isfinite(z) | ~np.isfinite(g).all(axis=1)
        if bad.any():
            nonfinite[idx[bad]] = True
            active[idx[bad]] = False
        ok = ~bad
        better = ok & (z > best_obj[idx])
        best_obj[idx[better]] = z[better]
        best_x[idx[better]] = xa[better]
        if t == steps:
            break
        ma = m if full else m[idx]
        stuck = _stuck(xa, g, ma, low, high, width)
        active[idx[ok & stuck]] = False
        go = ok & ~stuck
        inplace = full and bool(go.all())
        if not go.all():
            g, ma, xa = g[go], ma[go], xa[go]
        sel = idx[go]
        va = v if inplace else v[sel]
        # Adam moments and the clamped step, in place on the gathered copies.
        ma *= BETA1
        ma += (one - BETA1) * g
        g *= g
        va *= BETA2
        va += (one - BETA2) * g
        denom = np.sqrt(va / bc2)
        usable = (denom > 0) & np.isfinite(denom)
        if not usable.all():
            denom[~usable] = np.inf  # no step where Adam's denominator is unusable
        step = ma / bc1
        step /= denom
        step *= lr * width
        xa += step
        np.clip(xa, low, high, out=xa)
        if not inplace:
            x[sel], m[sel], v[sel] = xa, ma, va
        steps_run[sel] += 1
    # Best start per unit, then one plain forward pass to report z and the activation.
    best = best_obj.reshape(units.size, restarts).argmax(axis=1) + np.arange(units.size) * restarts
    chosen = best_x[best]
    a = chosen
    for _name, _act, w, b in layers[: layer + 1]:
        z = a @ w.T
        z += b
        a = np.maximum(z, 0.0)
    return chosen, z[np.arange(units.size), units], steps_run, nonfinite


ALGORITHM = _prefer_adam


def timed(fn, runs):
    fn()  # warm-up
    times = []
    out = None
    for _ in range(runs):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), times, out


def blas_info():
    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        return [{"note": "threadpoolctl not installed"}]
    keep = ("user_api", "internal_api", "version", "architecture", "num_threads", "threading_layer")
    return [{k: v for k, v in lib.items() if k in keep} for lib in threadpool_info()]


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("dir", type=Path, help="folder with the files written by benches/core.rs")
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--prefer-runs", type=int, default=3)
    ap.add_argument("--restarts", type=int, default=None,
                    help="prefer restarts (default: the Rust run's, else 1)")
    ap.add_argument("--rust", type=Path, help="the Rust bench's JSON, for ratios")
    ap.add_argument("--json", type=Path, help="write the numbers as JSON here")
    ap.add_argument("--only", help="comma-separated measurement names to run (default: all)")
    args = ap.parse_args()

    rust = json.loads(args.rust.read_text()) if args.rust else None
    restarts = args.restarts
    if restarts is None:
        restarts = int(rust["env"]["prefer_restarts"]) if rust else 1

    d = args.dir
    results = {}
    info = blas_info()
    print(f"numpy {np.__version__}, Python {platform.python_version()}", file=sys.stderr)
    print(f"BLAS: {info}", file=sys.stderr)
    print("OPENBLAS_CORETYPE =", os.environ.get("OPENBLAS_CORETYPE"),
          " OPENBLAS_L2_SIZE =", os.environ.get("OPENBLAS_L2_SIZE"), file=sys.stderr)

    def record(name, detail, m, times):
        results[name] = {"median_s": m, "runs_s": times, "detail": detail}

    only = set(args.only.split(",")) if args.only else None

    def want(name):
        if only is None or name in only:
            print(f"measuring {name} ...", file=sys.stderr)
            return True
        return False

    if want("load_json"):
        m, t, (layers, low, high) = timed(lambda: load_json_model(d / "model.json"), args.runs)
        record("load_json", "json.load + np.asarray(float32)", m, t)
    else:
        layers, low, high = load_json_model(d / "model.json")

    if want("load_safetensors"):
        m, t, st_layers = timed(lambda: load_safetensors_model(d / "model_st.json"), args.runs)
        record("load_safetensors", "json.load + safetensors.numpy.load_file", m, t)
        for (_, _, w1, b1), (_, _, w2, b2) in zip(layers, st_layers):
            assert np.array_equal(w1, w2) and np.array_equal(b1, b2), "the two model files differ"

    st_path = d / "model.safetensors"
    if want("read_safetensors_file"):
        m, t, _ = timed(lambda: len(st_path.read_bytes()), args.runs)
        record("read_safetensors_file", "Path.read_bytes (page cache)", m, t)

    if want("screen"):
        m, t, _rows = timed(lambda: screen(layers, low, high, d / "probe.npy"), args.runs)
        record("screen", f"10000 rows from probe.npy, chunks of {CHUNK_ROWS}", m, t)

    if want("screen_part_bounds"):
        m, t, _ = timed(lambda: interval_bounds(layers, low, high), args.runs)
        record("screen_part_bounds", "plain interval bound propagation, float64", m, t)

    probe_rows = np.load(d / "probe.npy")
    if want("screen_part_read_probe"):
        m, t, _ = timed(lambda: np.load(d / "probe.npy"), args.runs)
        record("screen_part_read_probe", "np.load of probe.npy", m, t)

    def forward_hidden():
        for start in range(0, probe_rows.shape[0], CHUNK_ROWS):
            a = probe_rows[start : start + CHUNK_ROWS]
            for _name, _act, w, b in layers[:-1]:
                z = a @ w.T
                z += b
                a = np.maximum(z, 0.0, out=z)

    if want("screen_part_forward"):
        m, t, _ = timed(forward_hidden, args.runs)
        record("screen_part_forward", f"hidden layers, in-memory rows, chunks of {CHUNK_ROWS}",
               m, t)

    prefer_summary = None
    if want("prefer_all"):
        units = np.arange(layers[PREFER_LAYER][2].shape[0])
        m, t, (_x, z, steps_run, nonfinite) = timed(
            lambda: prefer(layers, low, high, PREFER_LAYER, units, PREFER_STEPS, restarts, 0),
            args.prefer_runs,
        )
        record("prefer_all", f"layer h2, {units.size} units, {PREFER_STEPS} steps, "
               f"{restarts} restart(s)", m, t)
        per_unit_steps = steps_run.reshape(units.size, restarts).max(axis=1)
        prefer_summary = {
            "mean_preactivation": float(np.mean(z, dtype=np.float64)),
            "mean_steps": float(per_unit_steps.mean()),
            "all_finite": bool(not nonfinite.any() and np.isfinite(z).all()),
        }

    print()
    print("numpy core benchmarks (median of runs)")
    print(f"{'measurement':<24} {'median s':>10} {'min s':>10} {'runs':>6}  what")
    for name, r in results.items():
        print(f"{name:<24} {r['median_s']:>10.4f} {min(r['runs_s']):>10.4f} "
              f"{len(r['runs_s']):>6}  {r['detail']}")
    st_bytes = st_path.stat().st_size
    if "load_safetensors" in results and "read_safetensors_file" in results:
        ratio_st = (results["load_safetensors"]["median_s"]
                    / results["read_safetensors_file"]["median_s"])
        print(f"safetensors load / raw read (numpy): {ratio_st:.2f}")
    if prefer_summary:
        print(f"prefer result: mean preactivation {prefer_summary['mean_preactivation']:.4f}, "
              f"mean steps {prefer_summary['mean_steps']:.1f}, "
              f"all finite: {prefer_summary['all_finite']}")
        if rust and "prefer_mean_preactivation" in rust:
            print(f"  (receptor: mean preactivation {rust['prefer_mean_preactivation']:.4f}, "
                  f"mean steps {rust['prefer_mean_steps']:.1f})")

    ratios = {}
    if rust:
        print()
        print("Rust time / numpy time (below 1: receptor is faster)")
        for name in ("screen", "prefer_all", "load_json", "load_safetensors",
                     "screen_part_read_probe", "screen_part_forward", "screen_part_bounds"):
            rr = rust["results"].get(name)
            if rr and name in results:
                ratios[name] = rr["median_s"] / results[name]["median_s"]
                print(f"  {name:<22} {rr['median_s']:>9.4f} s / {results[name]['median_s']:>9.4f} s"
                      f" = {ratios[name]:.3f}")
        rl = rust["results"].get("load_safetensors")
        rd = rust["results"].get("read_safetensors_file")
        if rl and rd:
            ratios["rust_safetensors_load_vs_disk_read"] = rl["median_s"] / rd["median_s"]
            print(f"  receptor safetensors load / raw read of the file: "
                  f"{ratios['rust_safetensors_load_vs_disk_read']:.2f} "
                  f"({st_bytes / 1e6 / rl['median_s']:.0f} MB/s vs "
                  f"{st_bytes / 1e6 / rd['median_s']:.0f} MB/s)")

    if args.json:
        doc = {
            "tool": "benches/numpy_bench.py",
            "numpy": np.__version__,
            "python": platform.python_version(),
            "blas": info,
            "env": {k: os.environ.get(k) for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")},
            "prefer_restarts": restarts,
            "prefer_result": prefer_summary,
            "results": results,
            "ratios_rust_over_numpy": ratios,
        }
        args.json.write_text(json.dumps(doc, indent=2) + "\n")


if __name__ == "__main__":
    main()
