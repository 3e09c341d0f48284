#!/usr/bin/env python3
"""Writes the corpus of broken and hostile inputs in tests/bad-inputs/ and its INDEX.tsv.

Standard library only, deterministic. Each case gets one line in INDEX.tsv:
    file <TAB> kind (model | probe) <TAB> text the error message must contain <TAB> reason
`tests/bad_inputs.rs` runs the receptor binary on every case: `receptor stats FILE` for
models, `receptor screen good-model.json --probe FILE` for probe files.

ONNX cases are encoded here with a few lines of protobuf wire format (varints and
length-delimited fields), using the field numbers of the published ONNX specification
(onnx/onnx.proto; the same numbers as src/model/onnx/proto.rs).
"""
import json
import os
import random
import shutil
import struct

HERE = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests", "bad-inputs")

GOOD = {
    "schema": "receptor-model/1",
    "name": "corpus base model",
    "input": {"size": 4, "low": -1, "high": 1},
    "layers": [
        {"name": "h1", "type": "dense", "activation": "relu",
         "weights": [[0.5, -0.25, 0.125, 1.0], [1.0, 2.0, -3.0, 0.5], [-0.5, 0.5, 0.25, -1.0]],
         "bias": [0.1, -0.2, 0.0]},
        {"name": "out", "type": "dense", "activation": "softmax",
         "weights": [[1.0, -1.0, 0.5], [-1.0, 1.0, 0.25]], "bias": [0.0, 0.1],
         "labels": ["ok", "bad"]},
    ],
}

# A small convolutional model (schema version 2): 6 x 6 grey input, conv 3x3 -> 2 x 4 x 4,
# conv 2x2 -> 3 x 3 x 3, max pool 2 (stride 1) -> 3 x 2 x 2, flatten -> 12, dense -> 2.
GOOD_CONV = {
    "schema": "receptor-model/2",
    "name": "corpus conv model",
    "input": {"size": 36, "layout": {"kind": "image", "height": 6, "width": 6, "channels": 1},
              "low": 0, "high": 1},
    "layers": [
        {"name": "c1", "type": "conv2d", "activation": "relu",
         "weights": [[[[0.5, -0.25, 0.125], [1.0, 0.5, -0.5], [0.25, 0.0, -1.0]]],
                     [[[-0.5, 0.25, 0.5], [0.0, 1.0, 0.5], [-0.25, 0.125, 0.75]]]],
         "bias": [0.1, -0.1]},
        {"name": "c2", "type": "conv2d", "activation": "relu",
         "weights": [[[[0.5, -0.5], [0.25, 0.125]], [[1.0, 0.5], [-0.25, 0.5]]]] * 3,
         "bias": [0.0, 0.1, -0.1]},
        {"name": "p1", "type": "max_pool2d", "kernel": 2, "stride": 1},
        {"name": "flat", "type": "flatten"},
        {"name": "out", "type": "dense", "activation": "softmax",
         "weights": [[0.1 * (i % 5) - 0.2 for i in range(12)], [0.2 - 0.05 * (i % 7) for i in range(12)]],
         "bias": [0.0, 0.1], "labels": ["ok", "bad"]},
    ],
}

cases = []


def dump(obj):
    return json.dumps(obj, indent=1)


def good():
    return json.loads(json.dumps(GOOD))


def conv_model(name, mutate, expect, reason):
    m = json.loads(json.dumps(GOOD_CONV))
    mutate(m)
    put(name, dump(m), "model", expect, reason)


def layer(m, name):
    return next(l for l in m["layers"] if l["name"] == name)


def replaced(text, old, new):
    assert old in text, f"corpus generator: {old!r} not found"
    return text.replace(old, new, 1)


def put(name, data, kind, expect, reason):
    path = os.path.join(HERE, name)
    mode = "wb" if isinstance(data, bytes) else "w"
    with open(path, mode) as f:
        f.write(data)
    cases.append((name, kind, expect, reason))


def model(name, mutate, expect, reason):
    m = good()
    mutate(m)
    put(name, dump(m), "model", expect, reason)


def safetensors_bytes(tensors, header_override=None):
    """tensors: list of (name, dtype, shape, raw bytes)."""
    header = {}
    data = b""
    for n, dt, shape, raw in tensors:
        header[n] = {"dtype": dt, "shape": shape, "data_offsets": [len(data), len(data) + len(raw)]}
        data += raw
    if header_override is not None:
        header = header_override
    h = json.dumps(header).encode()
    h += b" " * ((8 - len(h) % 8) % 8)
    return struct.pack("<Q", len(h)) + h + data


def f32(values):
    return struct.pack("<%df" % len(values), *values)


W1 = [v for row in GOOD["layers"][0]["weights"] for v in row]
B1 = GOOD["layers"][0]["bias"]


def side_model(name, file, expect, reason, tensor="h1.weight"):
    m = good()
    m["layers"][0]["weights"] = {"safetensors": file, "tensor": tensor}
    m["layers"][0]["bias"] = {"safetensors": file, "tensor": "h1.bias"} if not file.startswith("/") else [0, 0, 0]
    put(name, dump(m), "model", expect, reason)


def npy(name, descr, shape, payload, fortran=False, magic=b"\x93NUMPY", version=(1, 0), header=None):
    if header is None:
        header = "{'descr': '%s', 'fortran_order': %s, 'shape': %s, }" % (
            descr, "True" if fortran else "False", repr(tuple(shape)))
    h = header.encode("latin1")
    pad = 64 - ((len(magic) + 2 + 2 + len(h) + 1) % 64)
    h = h + b" " * pad + b"\n"
    return magic + bytes(version) + struct.pack("<H", len(h)) + h + payload


def main():
    if os.path.isdir(HERE):
        shutil.rmtree(HERE)
    os.makedirs(HERE)
    rng = random.Random(20261201)
    with open(os.path.join(HERE, "good-model.json"), "w") as f:
        f.write(dump(GOOD))
    text = dump(GOOD)

    # --- model JSON: syntax and encoding
    put("empty.json", "", "model", "empty", "an empty file")
    put("whitespace.json", " \n\t\n", "model", "empty", "only whitespace")
    put("truncated.json", text[: len(text) // 2], "model", "truncated", "cut off half way")
    put("syntax-error.json", replaced(text, '"name": "h1",', '"name": "h1"'), "model", "not valid JSON", "a missing comma")
    put("not-an-object.json", "[1, 2, 3]", "model", "schema", "a JSON list, not an object")
    put("binary-garbage.json", bytes(rng.randrange(256) for _ in range(4096)), "model", "not", "random bytes")
    put("utf16.json", text.encode("utf-16"), "model", "UTF-8", "UTF-16 text with a byte-order mark")
    put("deep-nesting.json", replaced(text, '"name": "corpus base model"', '"name": "x", "junk": ' + "[" * 100000 + "]" * 100000),
        "model", "recursion limit", "100 000 nested lists under an unknown key")
    os.makedirs(os.path.join(HERE, "folder.json"))
    with open(os.path.join(HERE, "folder.json", "README"), "w") as f:
        f.write("A folder named like a model file: receptor must say it is a folder.\n")
    cases.append(("folder.json", "model", "folder", "a directory instead of a file"))

    # --- schema tag and top level
    model("no-schema.json", lambda m: m.pop("schema"), 'missing "schema"', "no schema tag")
    model("wrong-schema.json", lambda m: m.update(schema="receptor-model/3"), "unsupported schema", "a schema tag of another version")
    model("schema-number.json", lambda m: m.update(schema=1), "unsupported schema", "a schema tag that is a number")
    model("no-input.json", lambda m: m.pop("input"), 'missing "input"', "no input section")
    model("no-layers.json", lambda m: m.pop("layers"), 'missing "layers"', "no layers")
    model("empty-layers.json", lambda m: m.update(layers=[]), '"layers" is empty', "an empty layer list")
    model("layers-not-list.json", lambda m: m.update(layers={"h1": 1}), "schema", "layers given as an object")

    # --- values inside tensors
    def set_w(r, c, v):
        def f(m):
            m["layers"][0]["weights"][r][c] = v
        return f
    model("nan-literal.json", set_w(0, 0, float("nan")), "NaN", "NaN is not JSON (Python's json module writes it)")
    model("infinity-literal.json", set_w(0, 0, float("inf")), "not valid JSON", "Infinity is not JSON")
    model("overflow-f32.json", set_w(0, 0, 1e39), "not a finite 32-bit float", "finite in JSON, infinite as f32")
    model("string-in-weights.json", set_w(0, 0, "0.5"), "row 0, column 0", "a number written as a string")
    model("null-in-weights.json", set_w(1, 2, None), "row 1, column 2", "null in a weight")
    model("bool-in-bias.json", lambda m: m["layers"][0]["bias"].__setitem__(1, True), "bias: entry 1", "true in a bias")
    model("object-in-weights.json", set_w(2, 0, {"v": 1}), "row 2, column 0", "an object in a weight")
    model("nested-weights.json", set_w(0, 1, [1, 2]), "nested", "a list inside a weight row")

    # --- every shape mismatch
    model("ragged-rows.json", lambda m: m["layers"][0]["weights"][1].pop(), "row 1 has 3 values but row 0 has 4", "rows of unequal length")
    model("columns-mismatch.json", lambda m: [r.pop() for r in m["layers"][1]["weights"]],
          "weights have 2 columns but layer 'h1' has 3 units", "a layer that does not fit the one below")
    model("bias-length.json", lambda m: m["layers"][0]["bias"].pop(), "bias has 2 values but the weights have 3 rows", "bias too short")
    model("bias-2d.json", lambda m: m["layers"][0].update(bias=[[0.1], [0.2], [0.3]]), "bias must be a flat list", "a bias given as rows")
    model("weights-flat.json", lambda m: m["layers"][0].update(weights=W1), "list of rows", "weights given as a flat list")
    model("weights-empty.json", lambda m: m["layers"][0].update(weights=[]), "empty", "no rows")
    model("weights-empty-row.json", lambda m: m["layers"][0].update(weights=[[], [], []]), "empty", "rows without values")
    model("input-size-mismatch.json", lambda m: m["input"].update(size=5), '"size" is 5 but the first layer', "declared input size does not match the weights")
    model("huge-declared-size.json", lambda m: m["input"].update(size=10**12), '"size" is 1000000000000', "declared 10^12 inputs (must not allocate)")
    model("negative-size.json", lambda m: m["input"].update(size=-4), "whole number", "a negative size")
    model("huge-layout.json", lambda m: m["input"].update(layout={"kind": "image", "height": 10**9, "width": 10**9, "channels": 3}),
          "does not match", "an image layout of 10^18 pixels")
    model("layout-mismatch.json", lambda m: m["input"].update(layout={"kind": "image", "height": 3, "width": 3}), "does not match", "3x3 is not 4")
    model("layout-channels.json", lambda m: m["input"].update(layout={"kind": "image", "height": 1, "width": 2, "channels": 2}), "channels", "2 channels")
    model("layout-kind.json", lambda m: m["input"].update(layout={"kind": "volume"}), "unknown layout kind", "an unknown layout")
    model("low-above-high.json", lambda m: m["input"].update(low=2), '"low" is above "high"', "an empty box")
    model("low-array-length.json", lambda m: m["input"].update(low=[0, 0]), '"low" has 2 values but the input has 4', "box array of the wrong length")
    model("names-length.json", lambda m: m["input"].update(names=["a"]), '"names" has 1 entries', "too few feature names")
    model("labels-length.json", lambda m: m["layers"][1].update(labels=["ok"]), '"labels" has 1 entries', "too few labels")
    model("duplicate-labels.json", lambda m: m["layers"][1].update(labels=["ok", "ok"]), "used twice", "a label used twice")

    # --- names, kinds, activations
    model("duplicate-layer-names.json", lambda m: m["layers"][1].update(name="h1"), "'h1' is used twice", "two layers called h1")
    model("softmax-hidden.json", lambda m: m["layers"][0].update(activation="softmax"), "softmax is allowed only in the last layer", "softmax in a hidden layer")
    model("unknown-activation.json", lambda m: m["layers"][0].update(activation="swish"), 'unknown activation "swish"', "an activation receptor does not know")
    model("leaky-alpha.json", lambda m: m["layers"][0].update(activation="leaky_relu", alpha=5), "alpha", "leaky_relu slope above 1")
    model("layer-type.json", lambda m: m["layers"][0].update(type="lstm"), 'unsupported layer type "lstm"', "a layer type receptor does not know")

    # --- convolutional layers (schema version 2); every message names the layer
    with open(os.path.join(HERE, "good-conv-model.json"), "w") as f:
        f.write(dump(GOOD_CONV))
    conv_model("conv-in-v1.json", lambda m: m.update(schema="receptor-model/1"),
               "layer 'c1': layer type \"conv2d\" needs \"schema\": \"receptor-model/2\"", "a conv2d layer in a version 1 file")
    conv_model("conv-weights-rank.json", lambda m: layer(m, "c1").update(weights=[[0.5, 1.0], [1.0, 0.5]]),
               "layer 'c1': weights: a 2-D list; conv2d weights are 4-D", "2-D weights on a conv2d layer (wrong rank)")
    conv_model("conv-channels.json", lambda m: layer(m, "c2").update(weights=[[[[0.5, 0.5], [0.5, 0.5]]] * 4] * 3),
               "layer 'c2': weights expect 4 input channels but 'c1' gives 2", "a filter for 4 channels after 2")
    conv_model("conv-kernel-too-large.json", lambda m: layer(m, "c1").update(weights=[[[[0.1] * 7] * 7]] * 2),
               "layer 'c1': the kernel 7 x 7 (dilation 1 x 1) is larger than the padded input 6 x 6", "a kernel larger than the padded input")
    conv_model("conv-stride-zero.json", lambda m: layer(m, "c1").update(stride=0),
               "layer 'c1': \"stride\" must be a whole number from 1", "stride 0")
    conv_model("conv-stride-negative.json", lambda m: layer(m, "c2").update(stride=[1, -2]),
               "layer 'c2': \"stride\" must be a whole number from 1", "a negative stride")
    conv_model("conv-bias-length.json", lambda m: layer(m, "c1").update(bias=[0, 0, 0]),
               "layer 'c1': bias has 3 values but the weights have 2 filters", "three biases for two filters")
    conv_model("conv-ragged.json", lambda m: layer(m, "c1").update(weights=[[[[0.5, 1.0, 0.5], [1.0, 0.5]]]] * 2),
               "layer 'c1': weights: ragged", "kernel rows of unequal length")
    conv_model("conv-groups.json", lambda m: layer(m, "c2").update(groups=2),
               "layer 'c2': \"groups\" 2 is not supported", "a grouped convolution")
    conv_model("conv-vector-input.json", lambda m: m["input"].update(layout={"kind": "vector"}),
               "layer 'c1': a conv2d layer needs an image input layout", "a convolution on a vector input")
    conv_model("pool-empty-map.json", lambda m: layer(m, "p1").update(kernel=4),
               "layer 'p1': the window 4 x 4 (dilation 1 x 1) is larger than the padded input 3 x 3", "a pooling window that leaves an empty map")
    conv_model("pool-padding.json", lambda m: layer(m, "p1").update(padding=2),
               "layer 'p1': padding [2, 2] must be at most half the kernel", "pool padding larger than half the window")
    conv_model("pool-weights.json", lambda m: layer(m, "p1").update(weights=[[1.0]]),
               "layer 'p1': a max_pool2d layer has no \"weights\"", "weights on a pooling layer")
    conv_model("flatten-wrong-place.json", lambda m: m["layers"].insert(4, {"name": "flat2", "type": "flatten"}),
               "layer 'flat2': flatten is in the wrong place", "a flatten after a vector")
    conv_model("dense-after-map.json", lambda m: m["layers"].pop(3),
               "layer 'out': a dense layer after a spatial map needs a flatten first: 'p1' gives a 3 x 2 x 2 map", "a dense layer straight after a pooling")
    model("layer-no-name.json", lambda m: m["layers"][0].pop("name"), 'missing or empty "name"', "a layer without a name")

    # --- safetensors side files
    side_model("side-missing-file.json", "missing.safetensors", "cannot read side file", "the side file does not exist")
    side_model("side-outside-path.json", "../outside.safetensors", "climbs out of the model's folder", "a side file above the model's folder")
    side_model("side-absolute-path.json", "/etc/hostname", "is absolute", "an absolute side-file path")
    good_st = safetensors_bytes([("h1.weight", "F32", [3, 4], f32(W1)), ("h1.bias", "F32", [3], f32(B1))])
    put("lying-offsets.safetensors", safetensors_bytes([], header_override={
        "h1.weight": {"dtype": "F32", "shape": [3, 4], "data_offsets": [0, 48_000_000]},
        "h1.bias": {"dtype": "F32", "shape": [3], "data_offsets": [48_000_000, 48_000_012]}}) + f32(W1) + f32(B1),
        "side", "", "")
    side_model("side-lying-offsets.json", "lying-offsets.safetensors", "not a valid safetensors file", "a header whose offsets run past the file")
    put("huge-header.safetensors", struct.pack("<Q", 1 << 40) + b"{}", "side", "", "")
    side_model("side-huge-header.json", "huge-header.safetensors", "not a valid safetensors file", "a header length of 2^40 bytes")
    put("wrong-dtype.safetensors", safetensors_bytes([("h1.weight", "I32", [3, 4], struct.pack("<12i", *range(12))),
                                                     ("h1.bias", "F32", [3], f32(B1))]), "side", "", "")
    side_model("side-wrong-dtype.json", "wrong-dtype.safetensors", "dtype I32", "integer weights")
    put("wrong-shape.safetensors", safetensors_bytes([("h1.weight", "F32", [12], f32(W1)), ("h1.bias", "F32", [3], f32(B1))]), "side", "", "")
    side_model("side-wrong-shape.json", "wrong-shape.safetensors", "weights must be 2-D", "weights stored flat")
    put("shape-mismatch.safetensors", safetensors_bytes([("h1.weight", "F32", [4, 3], f32(W1)), ("h1.bias", "F32", [3], f32(B1))]), "side", "", "")
    side_model("side-shape-mismatch.json", "shape-mismatch.safetensors", "\"size\" is 4 but the first layer", "weights stored transposed")
    nan_w = list(W1)
    nan_w[5] = float("nan")
    put("nan.safetensors", safetensors_bytes([("h1.weight", "F32", [3, 4], f32(nan_w)), ("h1.bias", "F32", [3], f32(B1))]), "side", "", "")
    side_model("side-nan.json", "nan.safetensors", "not finite", "NaN stored in a side file")
    put("good.safetensors", good_st, "side", "", "")
    side_model("side-missing-tensor.json", "good.safetensors", 'has no tensor "fc1.weight"', "a tensor name that is not in the file", tensor="fc1.weight")
    put("truncated.safetensors", good_st[:-10], "side", "", "")
    side_model("side-truncated.json", "truncated.safetensors", "not a valid safetensors file", "a side file cut short")
    put("garbage.safetensors", bytes(rng.randrange(256) for _ in range(1000)), "side", "", "")
    side_model("side-garbage.json", "garbage.safetensors", "not a valid safetensors file", "random bytes as a side file")
    m = good()
    m["layers"][0]["weights"] = {"safetensors": "good.safetensors"}
    put("side-ref-incomplete.json", dump(m), "model", "needs both", "a tensor reference without a tensor name")

    # --- probe CSV (run against good-model.json)
    def probe(name, data, expect, reason):
        put(name, data, "probe", expect, reason)
    probe("probe-empty.csv", "", "no samples", "an empty probe file")
    probe("probe-header-only.csv", "a,b,c,d,label\n", "no samples", "a header and no rows")
    probe("probe-wrong-width.csv", "0,0,0,0\n0.5,0.5,0.5\n", "3", "a short row")
    probe("probe-too-wide.csv", "0,0,0,0,0\n", "5", "a row with five values for four inputs")
    probe("probe-non-numeric.csv", "0,0,0,0\n0,abc,0,0\n", "abc", "a word where a number belongs")
    probe("probe-nan.csv", "0,0,0,0\n0,NaN,0,0\n", "NaN", "a NaN cell")
    probe("probe-inf.csv", "0,0,0,0\n0,0,inf,0\n", "inf", "an infinite cell")
    probe("probe-unknown-label.csv", "a,b,c,d,label\n0,0,0,0,ok\n0,0,0,0,broken\n", "broken", "a label the model does not have")
    probe("probe-label-out-of-range.csv", "a,b,c,d,label\n0,0,0,0,7\n", "7", "a class index beyond the output units")
    probe("probe-fractional-label.csv", "a,b,c,d,label\n0,0,0,0,0.5\n", "0.5", "a class index that is not whole")
    probe("probe-header-width.csv", "a,b,c\n0,0,0\n", "3", "a header with three columns for four inputs")
    probe("probe-garbage.csv", bytes(rng.randrange(256) for _ in range(2048)), "probe-garbage.csv", "random bytes")
    probe("probe-unknown-extension.txt", "0,0,0,0\n", "unknown probe format", "neither .csv nor .npy")

    # --- probe .npy
    row = struct.pack("<4f", 0.1, 0.2, 0.3, 0.4)
    probe("npy-empty.npy", b"", "npy-empty.npy", "an empty .npy file")
    probe("npy-bad-magic.npy", b"NOTNUMPY" + b"\x00" * 120, "npy-bad-magic.npy", "not a NumPy file")
    probe("npy-1d.npy", npy("npy-1d", "<f4", (4,), row), "2-D", "a 1-D array")
    probe("npy-wrong-width.npy", npy("x", "<f4", (1, 3), row[:12]), "3", "three columns for four inputs")
    probe("npy-int.npy", npy("x", "<i4", (1, 4), struct.pack("<4i", 1, 2, 3, 4)), "<i4", "integer data")
    probe("npy-lying-shape.npy", npy("x", "<f4", (10**12, 4), row * 2), "1000000000000", "declares 10^12 rows but holds 2")
    probe("npy-truncated.npy", npy("x", "<f4", (3, 4), row * 2 + row[:6]), "npy-truncated.npy", "data cut short")
    probe("npy-nan.npy", npy("x", "<f8", (2, 4), struct.pack("<8d", 0, 0, 0, 0, 0, float("nan"), 0, 0)), "NaN", "a NaN value")
    probe("npy-bad-header.npy", npy("x", "<f4", (1, 4), row, header="{'descr': <f4, 'shape': ((}"), "npy-bad-header.npy", "a header that is not a Python dict")
    probe("npy-zero-rows.npy", npy("x", "<f4", (0, 4), b""), "no samples", "an array with no rows")

    onnx_cases(rng)

    cases.sort()
    with open(os.path.join(HERE, "INDEX.tsv"), "w") as f:
        f.write("# file\tkind\tthe message must contain\treason\n")
        for name, kind, expect, reason in cases:
            if kind != "side":
                f.write(f"{name}\t{kind}\t{expect}\t{reason}\n")
    print(len([c for c in cases if c[1] != "side"]), "cases")


# --- ONNX: protobuf wire format (https://protobuf.dev/programming-guides/encoding/) ----------

def varint(n):
    n &= (1 << 64) - 1  # negative int64 values are ten bytes of two's complement
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        if n:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def f_int(num, v):
    return varint(num << 3) + varint(v)


def f_bytes(num, b):
    if isinstance(b, str):
        b = b.encode()
    return varint(num << 3 | 2) + varint(len(b)) + b


def f_float(num, v):
    return varint(num << 3 | 5) + struct.pack("<f", v)


def o_tensor(name, dims, values=None, data_type=1, raw=None, ext=None, typed=None):
    """TensorProto: dims 1, data_type 2, float_data 4, name 8, raw_data 9,
    external_data 13, data_location 14."""
    b = b"".join(f_int(1, d) for d in dims) + f_int(2, data_type) + f_bytes(8, name)
    if typed is not None:
        b += f_bytes(4, struct.pack(f"<{len(typed)}f", *typed))
    elif ext is not None:
        b += b"".join(f_bytes(13, f_bytes(1, k) + f_bytes(2, v)) for k, v in ext) + f_int(14, 1)
    else:
        if raw is None:
            raw = struct.pack(f"<{len(values)}f", *values)
        b += f_bytes(9, raw)
    return b


def o_value(name, dims, elem=1):
    """ValueInfoProto {name 1, type 2: TypeProto {tensor_type 1: {elem_type 1, shape 2:
    TensorShapeProto {dim 1: Dimension {dim_value 1 | dim_param 2}}}}}."""
    shape = b"".join(f_bytes(1, f_bytes(2, d) if isinstance(d, str) else f_int(1, d)) for d in dims)
    return f_bytes(1, name) + f_bytes(2, f_bytes(1, f_int(1, elem) + f_bytes(2, shape)))


def o_attr(name, v):
    """AttributeProto: name 1, f 2, i 3, t 5, type 20 (FLOAT 1, INT 2, TENSOR 4)."""
    if isinstance(v, float):
        return f_bytes(1, name) + f_float(2, v) + f_int(20, 1)
    if isinstance(v, bytes):
        return f_bytes(1, name) + f_bytes(5, v) + f_int(20, 4)
    return f_bytes(1, name) + f_int(3, v) + f_int(20, 2)


def o_node(op, inputs, outputs, name, **attrs):
    """NodeProto: input 1, output 2, name 3, op_type 4, attribute 5."""
    return (b"".join(f_bytes(1, i) for i in inputs) + b"".join(f_bytes(2, o) for o in outputs)
            + f_bytes(3, name) + f_bytes(4, op) + b"".join(f_bytes(5, o_attr(k, v)) for k, v in attrs.items()))


def o_model(nodes, inits, inputs, outputs, meta=()):
    """ModelProto {ir_version 1, graph 7: GraphProto {node 1, name 2, initializer 5,
    input 11, output 12}, opset_import 8 {domain 1, version 2}, metadata_props 14}."""
    g = (b"".join(f_bytes(1, n) for n in nodes) + f_bytes(2, "corpus")
         + b"".join(f_bytes(5, t) for t in inits) + b"".join(f_bytes(11, v) for v in inputs)
         + b"".join(f_bytes(12, v) for v in outputs))
    return (f_int(1, 8) + f_bytes(7, g) + f_bytes(8, f_bytes(1, "") + f_int(2, 17))
            + b"".join(f_bytes(14, f_bytes(1, k) + f_bytes(2, v)) for k, v in meta))


W1 = [0.5, -0.25, 0.125, 1.0, 1.0, 2.0, -3.0, 0.5, -0.5, 0.5, 0.25, -1.0]


def onnx_good(first=None, w1=None, inputs=None, outputs=None, meta=(), tail=None, middle=None):
    """input [batch, 4] -> Gemm (3 units) -> Relu -> Gemm (2 units) -> Softmax, with pieces
    replaceable for each case."""
    inits = [w1 or o_tensor("fc1.weight", [3, 4], W1), o_tensor("fc1.bias", [3], [0.1, -0.2, 0.0]),
             o_tensor("fc2.weight", [2, 3], [1.0, -1.0, 0.5, -1.0, 1.0, 0.25]), o_tensor("fc2.bias", [2], [0.0, 0.1])]
    nodes = [first or o_node("Gemm", ["input", "fc1.weight", "fc1.bias"], ["h1"], "/fc1/Gemm", transB=1)]
    nodes += middle if middle is not None else [o_node("Relu", ["h1"], ["a1"], "/fc1/Relu")]
    nodes += [o_node("Gemm", ["a1", "fc2.weight", "fc2.bias"], ["h2"], "/fc2/Gemm", transB=1),
              tail or o_node("Softmax", ["h2"], ["output"], "/out/Softmax", axis=-1)]
    return o_model(nodes, inits, inputs or [o_value("input", ["batch", 4])], outputs or [o_value("output", ["batch", 2])], meta)


def onnx_cases(rng):
    def case(name, data, expect, reason):
        put(name, data, "model", expect, reason)

    good_onnx = onnx_good()
    put("good-model.onnx", good_onnx, "side", "", "")
    case("onnx-empty.onnx", b"", "it has no graph", "an empty .onnx file")
    case("onnx-garbage.onnx", bytes(rng.randrange(256) for _ in range(3000)), "not a readable ONNX file", "random bytes")
    case("onnx-truncated.onnx", good_onnx[:-9], "not a readable ONNX file", "a model cut short")
    case("UPPER-CASE.ONNX", b"\x3a\xff\xff\xff\xff\x0f", "not a readable ONNX file", "a .ONNX extension in capitals is read as ONNX (a lying length)")
    case("onnx-huge-dims.onnx", onnx_good(w1=o_tensor("fc1.weight", [10**12, 10**12], W1)), "absurd dimensions", "dimensions whose product overflows")
    case("onnx-lying-size.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 10**9], W1)), "holds 48", "declares 3 x 10^9 weights, holds 12")
    case("onnx-typed-short.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], typed=W1[:5])), "the file holds 5", "float_data with 5 of 12 values")
    case("onnx-negative-dim.onnx", onnx_good(w1=o_tensor("fc1.weight", [-3, 4], W1)), "negative size -3", "a negative dimension")
    case("onnx-int-weights.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], raw=b"\0" * 48, data_type=6)), "int32", "int32 weights")
    case("onnx-external-outside.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], ext=[("location", "../secret.bin")])), "climbs out of the model's folder", "external data outside the model's folder")
    case("onnx-external-absolute.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], ext=[("location", "/etc/passwd")])), "is absolute", "external data at an absolute path")
    put("onnx-short.bin", b"\0" * 10, "side", "", "")
    case("onnx-external-short.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], ext=[("location", "onnx-short.bin")])), "which has 10 bytes", "external data file shorter than the tensor")
    case("onnx-external-missing.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], ext=[("location", "no-such.bin")])), "cannot open external data 'no-such.bin'", "external data file missing")
    case("onnx-external-length.onnx", onnx_good(w1=o_tensor("fc1.weight", [3, 4], ext=[("location", "onnx-short.bin"), ("length", "99999999999")])), "external data length is 99999999999", "external data length that disagrees with the shape")
    case("onnx-unsupported-op.onnx", onnx_good(middle=[o_node("Cos", ["h1"], ["a1"], "cosine")]), "node 'cosine' (Cos, node 2 of 4)", "an operator receptor does not read")
    case("onnx-conv-group.onnx", onnx_good(middle=[o_node("Conv", ["h1", "fc1.bias"], ["a1"], "conv", group=2)]), "node 'conv' (Conv, node 2 of 4)", "a grouped convolution")
    case("onnx-avgpool-pad.onnx", onnx_good(middle=[o_node("AveragePool", ["h1"], ["a1"], "pool", count_include_pad=0)]), "node 'pool' (AveragePool, node 2 of 4)", "average pooling that leaves padding out")
    case("onnx-residual.onnx", onnx_good(middle=[o_node("Relu", ["h1"], ["r1"], "relu"), o_node("Add", ["r1", "h1"], ["a1"], "residual")]), "so the graph branches", "a residual connection")
    case("onnx-two-inputs.onnx", onnx_good(inputs=[o_value("input", ["batch", 4]), o_value("extra", ["batch", 4])]), "has 2 inputs", "two graph inputs")
    case("onnx-two-outputs.onnx", onnx_good(outputs=[o_value("output", ["batch", 2]), o_value("h1", ["batch", 3])]), "has 2 outputs", "two graph outputs")
    case("onnx-dynamic-image.onnx", onnx_good(inputs=[o_value("input", ["batch", 1, "height", 2])]), "not a fixed positive size", "an image input of unknown height")
    case("onnx-rank3.onnx", onnx_good(inputs=[o_value("input", ["batch", 2, 2])]), "has 3 dimensions", "a 3-D input")
    case("onnx-transa.onnx", onnx_good(first=o_node("Gemm", ["input", "fc1.weight", "fc1.bias"], ["h1"], "g", transA=1, transB=1)), "transA = 1", "Gemm with transA")
    case("onnx-softmax-axis.onnx", onnx_good(tail=o_node("Softmax", ["h2"], ["output"], "sm", axis=0)), "axis 0", "softmax over the batch axis")
    case("onnx-leaky-alpha.onnx", onnx_good(middle=[o_node("LeakyRelu", ["h1"], ["a1"], "lr", alpha=2.0)]), "has alpha 2", "LeakyRelu slope above 1")
    case("onnx-two-activations.onnx", onnx_good(middle=[o_node("Relu", ["h1"], ["r1"], "relu1"), o_node("Tanh", ["r1"], ["a1"], "tanh2")]), "follows the activation Relu", "two activations in a row")
    case("onnx-unknown-attribute.onnx", onnx_good(middle=[o_node("Relu", ["h1"], ["a1"], "relu", bogus=1)]), "attribute 'bogus'", "an attribute receptor does not read")
    case("onnx-batchnorm-first.onnx", onnx_good(first=o_node("BatchNormalization", ["input", "fc1.bias", "fc1.bias", "fc1.bias", "fc1.bias"], ["h1"], "bn")), "comes before any Gemm", "BatchNormalization with no layer to fold into")
    case("onnx-width-mismatch.onnx", onnx_good(inputs=[o_value("input", ["batch", 5])]), "has weights for 4 inputs but the value before it has 5", "weights that do not fit the input")
    case("onnx-matmul-order.onnx", onnx_good(first=o_node("MatMul", ["fc1.weight", "input"], ["h1"], "mm")), "does not multiply the incoming value", "the weight matrix on the left")
    case("onnx-reshape.onnx", onnx_good(first=o_node("Reshape", ["input", "fc1.bias"], ["h1"], "rs")), "int64 is expected", "a Reshape whose shape is not int64")
    case("onnx-bad-labels.onnx", onnx_good(meta=[("receptor.labels", "yes,no")]), "receptor.labels", "labels metadata that is not a JSON array")
    case("onnx-bad-box.onnx", onnx_good(meta=[("receptor.low", "0,0,zero,0")]), "receptor.low", "box metadata with a word in it")
    case("onnx-box-inverted.onnx", onnx_good(meta=[("receptor.low", "2"), ("receptor.high", "1")]), "above", "low above high in the metadata")
    os.makedirs(os.path.join(HERE, "onnx-folder.onnx"), exist_ok=True)
    with open(os.path.join(HERE, "onnx-folder.onnx", "README"), "w") as f:
        f.write("A folder named like an ONNX file: receptor must say it is a folder.\n")
    cases.append(("onnx-folder.onnx", "model", "folder", "a directory called .onnx"))


if __name__ == "__main__":
    main()
