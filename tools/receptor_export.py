#!/usr/bin/env python3
"""Write a trained network in receptor's model schema.

Dense-only networks are written as ``"schema": "receptor-model/1"``, exactly as before; a
network that uses any convolutional layer type (``conv2d``, ``max_pool2d``, ``avg_pool2d``,
``flatten``) is written as ``"schema": "receptor-model/2"``.

Two ways in:

* ``export_arrays(layers, input_size, low, high, path=...)`` from numpy arrays. A dense layer
  is ``(name, weights, bias, activation)`` with ``weights`` shaped ``[units, inputs]`` (one
  row per unit: the orientation of PyTorch's ``nn.Linear.weight``; transpose scikit-learn's
  ``coefs_``, which are ``[inputs, units]``). The other layer types are dicts, see
  :func:`export_arrays`; convolution weights are ``[out_channels, in_channels, kernel_h,
  kernel_w]``, the orientation of PyTorch's ``nn.Conv2d.weight``.
* ``export_torch(model, path=...)`` from a PyTorch ``nn.Sequential`` of ``Linear``,
  ``Conv2d``, ``MaxPool2d``, ``AvgPool2d``, ``AdaptiveAvgPool2d(1)``,
  ``AdaptiveMaxPool2d(1)``, ``Flatten``, ``BatchNorm2d``/``BatchNorm1d`` and activation
  modules (``ReLU``, ``LeakyReLU``, ``Sigmoid``, ``Tanh``, ``Softmax``, ``Identity``);
  ``Dropout`` modules are skipped (they do nothing at inference). Anything else is refused
  with an error naming the module.
* ``export_onnx(model, example, path=..., low=..., high=...)``: any PyTorch module through
  ``torch.onnx.export``, with the input box (and class labels) written into the ONNX file's
  ``metadata_props`` under ``receptor.low``, ``receptor.high``, ``receptor.labels`` and
  ``receptor.names`` (and ``receptor.units``); receptor opens the ``.onnx`` file directly (needs the ``onnx`` package).

* ``CheckpointWriter(folder, every=N, ...)`` in a training loop: ``writer(model, step)``
  writes ``folder/ckpt-<step>.json`` (``"step"`` set) with every tensor in
  ``folder/ckpt-<step>.safetensors`` when ``step`` is a multiple of ``N``
  (:func:`save_checkpoint` writes one unconditionally); ``receptor timeline folder`` then
  reads the series.

Batch normalisation is not a layer type of the schema: ``export_torch`` folds every
``BatchNorm2d`` (``BatchNorm1d``) into the ``Conv2d`` (``Linear``) directly before it, using
the running statistics, i.e. the network's inference (``eval()``) behaviour. The fold is exact
at inference up to float32 rounding: with ``s = gamma / sqrt(running_var + eps)``,
``W' = s * W`` (per output channel) and ``b' = s * (b - running_mean) + beta``
(:func:`fold_batchnorm`, also usable on numpy arrays). A batch normalisation that does not
directly follow a convolution or linear layer is refused.

Input layout: receptor's input vector stays row-major, channel last (``height x width x
channels``); convolutional layers see it as ``[channels, height, width]``, the layout of a
PyTorch image tensor, so a model trained on ``[N, C, H, W]`` tensors exports unchanged.
``flatten`` turns a ``[channels, height, width]`` map into a vector in PyTorch order
(channel, then row, then column), so a ``Linear`` after ``Flatten`` loads unchanged. A
``Flatten`` before any other layer is taken to act on a flat input and is skipped, as
before.

Tensors with at least ``safetensors_threshold`` elements are written to a safetensors side
file next to the JSON file (needs the ``safetensors`` package from PyPI) and referenced by a
relative path; smaller ones are written inline. Everything is stored as float32.

Requires numpy; torch only for ``export_torch`` and ``export_onnx``, onnx only for
``export_onnx`` (imported there, not at module load).

Example::

    import torch.nn as nn
    from receptor_export import export_torch
    net = nn.Sequential(
        nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(), nn.MaxPool2d(2),
        nn.Flatten(), nn.Linear(8 * 8 * 8, 5), nn.Softmax(dim=1),
    ).eval()
    export_torch(net, path="model.json", low=0.0, high=1.0, layout=(16, 16, 3))
    # or, through ONNX, in one line:
    export_onnx(net, torch.zeros(1, 3, 16, 16), path="model.onnx", low=0.0, high=1.0)
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np

#: The schema tag of dense-only files.
SCHEMA_V1 = "receptor-model/1"
#: The schema tag of files using any convolutional layer type.
SCHEMA_V2 = "receptor-model/2"
#: Kept for callers of the first version: the dense-only tag.
SCHEMA = SCHEMA_V1

#: Layer types that need ``receptor-model/2``.
SPATIAL_TYPES = ("conv2d", "max_pool2d", "avg_pool2d", "flatten")

#: Tensors with at least this many elements go to the safetensors side file by default.
DEFAULT_SAFETENSORS_THRESHOLD = 65536

ACTIVATIONS = ("identity", "relu", "leaky_relu", "sigmoid", "tanh", "softmax")


class ExportError(ValueError):
    """The network cannot be written in the schema; the message says exactly why."""


def _parse_activation(spec, where):
    """Accepts "relu", ("leaky_relu", 0.2) or {"activation": "leaky_relu", "alpha": 0.2}."""
    alpha = None
    if isinstance(spec, (tuple, list)):
        if len(spec) != 2:
            raise ExportError(f"{where}: activation tuple must be (name, alpha), got {spec!r}")
        spec, alpha = spec
    elif isinstance(spec, dict):
        alpha = spec.get("alpha")
        spec = spec.get("activation")
    if not isinstance(spec, str):
        raise ExportError(f"{where}: activation must be a name, got {spec!r}")
    name = spec.lower()
    if name == "logistic":  # scikit-learn's name for the sigmoid
        name = "sigmoid"
    if name not in ACTIVATIONS:
        raise ExportError(
            f"{where}: unknown activation '{spec}'; expected one of {', '.join(ACTIVATIONS)}"
        )
    entry = {"activation": name}
    if name == "leaky_relu":
        a = 0.01 if alpha is None else float(alpha)
        if not (0.0 <= a <= 1.0):
            raise ExportError(f"{where}: leaky_relu alpha must be in [0, 1], got {a}")
        entry["alpha"] = a
    elif alpha is not None:
        raise ExportError(f"{where}: alpha is only meaningful for leaky_relu, not {name}")
    return entry


def _as_f32(a, what, ndim):
    try:
        arr = np.asarray(a)
    except Exception as e:  # noqa: BLE001 - report any conversion failure in our words
        raise ExportError(f"{what}: cannot convert to an array: {e}") from e
    if arr.dtype.kind not in "fiub":
        raise ExportError(f"{what}: expected numbers, got dtype {arr.dtype}")
    if arr.ndim != ndim:
        raise ExportError(f"{what}: expected a {ndim}-D array, got shape {arr.shape}")
    arr = arr.astype(np.float32)
    bad = ~np.isfinite(arr)
    if bad.any():
        idx = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ExportError(f"{what}: non-finite value {arr[idx]} at index {list(idx)}")
    return np.ascontiguousarray(arr)


def _f32_list(arr):
    """Nested lists of floats that print in the shortest form reading back to the same f32."""
    if arr.ndim == 1:
        return [_short(x) for x in arr]
    return [_f32_list(x) for x in arr]


def _short(x):
    # str() of a numpy float32 is its shortest round-tripping decimal; as a Python float it
    # is printed by json the same way and parses back to the identical float32.
    return float(str(np.float32(x)))


def _box(value, size, what):
    if np.isscalar(value):
        v = float(value)
        if not math.isfinite(v):
            raise ExportError(f"input {what}: must be finite, got {v}")
        return np.full(size, v, dtype=np.float32), _short(v)
    arr = _as_f32(value, f"input {what}", 1)
    if arr.shape[0] != size:
        raise ExportError(f"input {what}: has {arr.shape[0]} values but the input size is {size}")
    return arr, [_short(x) for x in arr]


def _layout(layout, size):
    if layout is None or layout == "vector" or layout == {"kind": "vector"}:
        return {"kind": "vector"}
    if isinstance(layout, dict):
        if layout.get("kind") != "image":
            raise ExportError(f"layout: kind must be 'vector' or 'image', got {layout!r}")
        h, w, c = layout.get("height"), layout.get("width"), layout.get("channels", 1)
    elif isinstance(layout, (tuple, list)) and len(layout) in (2, 3):
        h, w = layout[0], layout[1]
        c = layout[2] if len(layout) == 3 else 1
    else:
        raise ExportError(
            f"layout: expected 'vector', (height, width[, channels]) or a dict, got {layout!r}"
        )
    if not all(isinstance(v, (int, np.integer)) and v > 0 for v in (h, w, c)):
        raise ExportError(f"layout: height, width and channels must be positive integers, got {h}, {w}, {c}")
    if c not in (1, 3):
        raise ExportError(f"layout: channels must be 1 or 3, got {c}")
    if h * w * c != size:
        raise ExportError(f"layout: {h} x {w} x {c} = {h * w * c} but the input size is {size}")
    return {"kind": "image", "height": int(h), "width": int(w), "channels": int(c)}


def _write_atomic(path: Path, write):
    """Writes through a temporary file in the same folder, then renames it over `path`."""
    fd, tmp = tempfile.mkstemp(prefix=".receptor-", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        write(tmp)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


def _pair(value, what, minimum):
    """An int or ``[h, w]`` / ``(h, w)`` of ints >= minimum -> (h, w)."""
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        pair = (int(value), int(value))
    elif (
        isinstance(value, (tuple, list))
        and len(value) == 2
        and all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in value)
    ):
        pair = (int(value[0]), int(value[1]))
    else:
        raise ExportError(f"{what}: expected an integer or [h, w], got {value!r}")
    if min(pair) < minimum:
        raise ExportError(f"{what}: must be at least {minimum}, got {value!r}")
    return pair


def _pair_json(pair):
    """One integer when both sides agree, else ``[h, w]`` (the schema accepts both)."""
    return pair[0] if pair[0] == pair[1] else [pair[0], pair[1]]


def _out_size(size, kernel, stride, padding, dilation=1):
    """Output length along one axis, as PyTorch computes it (floor mode):
    ``floor((size + 2 padding - dilation (kernel - 1) - 1) / stride) + 1``."""
    span = dilation * (kernel - 1) + 1
    if size + 2 * padding < span:
        return 0
    return (size + 2 * padding - span) // stride + 1


def _shape_str(shape):
    if shape[0] == "vector":
        return f"a vector of {shape[1]}"
    return f"a [{shape[1]}, {shape[2]}, {shape[3]}] map"


def fold_batchnorm(weights, bias, gamma, beta, mean, var, eps=1e-5):
    """Folds an inference-time batch normalisation into the layer before it.

    weights: ``[out, ...]`` (a dense ``[units, inputs]`` or a convolution ``[out_channels,
    in_channels, kh, kw]``); bias: ``[out]`` or ``None`` (zeros); gamma, beta, mean, var:
    ``[out]`` (``gamma``/``beta`` ``None`` for a normalisation without affine parameters).
    With ``s = gamma / sqrt(var + eps)`` returns ``(s * W, s * (b - mean) + beta)`` as
    float32, computed in float64: the batch normalisation ``s * (z - mean) + beta`` of the
    layer's output ``z = W x + b`` is then the plain layer ``W' x + b'`` (PyTorch's
    ``BatchNorm`` formula in ``eval()`` mode).
    """
    w = np.asarray(weights, np.float64)
    out = w.shape[0]
    b = np.zeros(out) if bias is None else np.asarray(bias, np.float64)
    g = np.ones(out) if gamma is None else np.asarray(gamma, np.float64)
    be = np.zeros(out) if beta is None else np.asarray(beta, np.float64)
    m = np.asarray(mean, np.float64)
    v = np.asarray(var, np.float64)
    for what, a in (("bias", b), ("gamma", g), ("beta", be), ("running_mean", m), ("running_var", v)):
        if a.shape != (out,):
            raise ExportError(f"batch normalisation: {what} has shape {a.shape} but the layer has {out} outputs")
    if np.any(v + eps <= 0):
        raise ExportError("batch normalisation: running_var + eps must be positive")
    s = g / np.sqrt(v + eps)
    w2 = w * s.reshape((out,) + (1,) * (w.ndim - 1))
    b2 = s * (b - m) + be
    return w2.astype(np.float32), b2.astype(np.float32)


def _layer_spec(i, layer):
    """A layer given as a dense 4-tuple or a dict -> a dict with a "type"."""
    if isinstance(layer, dict):
        spec = dict(layer)
        spec.setdefault("type", "dense")
        if "name" not in spec:
            raise ExportError(f"layer {i}: a layer given as a dict needs a 'name'")
        return spec
    if isinstance(layer, (tuple, list)):
        if len(layer) != 4:
            raise ExportError(f"layer {i}: expected (name, weights, bias, activation), got {len(layer)} items")
        lname, w, b, act = layer
        return {"name": lname, "type": "dense", "weights": w, "bias": b, "activation": act}
    raise ExportError(f"layer {i}: expected a (name, weights, bias, activation) tuple or a dict, got {type(layer).__name__}")


_ALLOWED_KEYS = {
    "dense": {"name", "type", "weights", "bias", "activation"},
    "conv2d": {"name", "type", "weights", "bias", "activation", "stride", "padding", "dilation"},
    "max_pool2d": {"name", "type", "kernel", "stride", "padding"},
    "avg_pool2d": {"name", "type", "kernel", "stride", "padding"},
    "flatten": {"name", "type"},
}


def _unit_list(units, input_size):
    """The features' units as strings, one per input, or ExportError."""
    units = [str(u) for u in units]
    if len(units) != input_size:
        raise ExportError(f"units: {len(units)} units but the input size is {input_size}")
    return units


def _step(step):
    """A training step for the top-level ``"step"``: a whole number from 0."""
    if isinstance(step, bool) or not isinstance(step, (int, np.integer)) or step < 0:
        raise ExportError(f"step must be a whole number from 0 (a training step), not {step!r}")
    return int(step)


def export_arrays(
    layers,
    input_size,
    low=-1.0,
    high=1.0,
    layout=None,
    names=None,
    labels=None,
    *,
    path,
    name="model",
    description=None,
    safetensors_threshold=DEFAULT_SAFETENSORS_THRESHOLD,
    safetensors_file=None,
    units=None,
    step=None,
):
    """Writes a network given as arrays to ``path`` (JSON) in receptor's model schema.

    layers: a list, bottom to top, of

        * ``(name, weights [units, inputs], bias [units], activation)`` for a dense layer (or
          the same as a dict with ``"type": "dense"``); the activation is a name
          (``identity``, ``relu``, ``leaky_relu``, ``sigmoid`` (or ``logistic``), ``tanh``,
          ``softmax`` (last layer only)) or ``("leaky_relu", alpha)``;
        * ``{"name", "type": "conv2d", "weights" [out_channels, in_channels, kh, kw],
          "bias" [out_channels] (optional, zeros), "stride" (1), "padding" (0, zero padding),
          "dilation" (1), "activation" ("identity")}``; stride, padding and dilation are one
          integer or ``[h, w]``;
        * ``{"name", "type": "max_pool2d" or "avg_pool2d", "kernel", "stride" (= kernel),
          "padding" (0)}``; ``"kernel": "global"`` pools the whole map (what
          ``AdaptiveAvgPool2d(1)`` does); average pooling counts padded cells, as PyTorch's
          default ``count_include_pad=True`` does;
        * ``{"name", "type": "flatten"}``: a ``[channels, height, width]`` map to a vector in
          PyTorch order (channel, then row, then column).

        A convolution or pool needs a spatial map: the input with an image ``layout`` (seen
        as ``[channels, height, width]``) or the map of the layer below; a dense layer after
        a map needs a ``flatten`` first. Output sizes follow PyTorch's floor formula.
    input_size: number of inputs; the first dense layer's weights must have that many
        columns.
    low, high: the input box, one number or ``input_size`` numbers each.
    layout: ``None``/``"vector"`` or ``(height, width[, channels])`` for an image patch
        (row-major, channel last).
    names: optional feature names, ``input_size`` strings.
    units: optional physical unit of each feature (``"degC"``, ``"%"``, ``"A"``; ``""`` for
        none), ``input_size`` strings; written as the schema's ``input.units``.
    labels: optional class names for the last layer's units (the last layer must be dense).
    path: the JSON file to write; a side file (default ``<stem>.safetensors`` beside it)
        receives every tensor with at least ``safetensors_threshold`` elements. Use
        ``safetensors_threshold=None`` to write everything inline.
    step: optional training step (a whole number from 0), written as the top-level
        ``"step"``; ``receptor timeline`` orders checkpoints by it.

    The file declares ``receptor-model/1`` when every layer is dense, else
    ``receptor-model/2``. Returns the path of the JSON file. Raises ``ExportError`` (a
    ``ValueError``) naming the layer and the shapes when the network does not fit the schema;
    nothing is written then.
    """
    path = Path(path)
    if not isinstance(input_size, (int, np.integer)) or input_size <= 0:
        raise ExportError(f"input_size must be a positive integer, got {input_size!r}")
    input_size = int(input_size)
    if not layers:
        raise ExportError("the network has no layers")

    lo, lo_json = _box(low, input_size, "low")
    hi, hi_json = _box(high, input_size, "high")
    if np.any(lo > hi):
        i = int(np.argmax(lo > hi))
        raise ExportError(f"input box: low[{i}] = {lo[i]} is above high[{i}] = {hi[i]}")
    inp = {"size": input_size, "layout": _layout(layout, input_size), "low": lo_json, "high": hi_json}
    if names is not None:
        names = [str(n) for n in names]
        if len(names) != input_size:
            raise ExportError(f"names: {len(names)} names but the input size is {input_size}")
        inp["names"] = names
    if units is not None:
        inp["units"] = _unit_list(units, input_size)

    # What the next layer reads: ("vector", n) or ("map", channels, height, width). The raw
    # input of an image layout is both: a dense layer reads its flat vector, a convolution
    # its map.
    lay = inp["layout"]
    shape = ("vector", input_size)
    if lay["kind"] == "image":
        shape = ("map", lay["channels"], lay["height"], lay["width"])
    below_name = "the input"
    seen = set()
    entries, side = [], {}
    specs = [_layer_spec(i, layer) for i, layer in enumerate(layers)]
    for i, spec in enumerate(specs):
        lname = str(spec["name"])
        where = f"layer '{lname}'"
        if not lname:
            raise ExportError(f"layer {i}: the name is empty")
        if lname in seen:
            raise ExportError(f"{where}: the name is used twice (layer names must be unique)")
        seen.add(lname)
        kind = spec["type"]
        if kind not in _ALLOWED_KEYS:
            raise ExportError(
                f"{where}: unknown layer type '{kind}'; expected one of {', '.join(_ALLOWED_KEYS)}"
            )
        extra = sorted(set(spec) - _ALLOWED_KEYS[kind])
        if extra:
            raise ExportError(f"{where}: a {kind} layer has no field {', '.join(map(repr, extra))}")
        entry = {"name": lname, "type": kind}
        tensors = {}
        if kind == "dense":
            if shape[0] == "map" and i > 0:
                raise ExportError(
                    f"{where}: a dense layer after {_shape_str(shape)} from '{below_name}' needs a flatten layer first"
                )
            fan_in = input_size if i == 0 else shape[1]
            w = _as_f32(spec.get("weights"), f"{where}: weights", 2)
            units = w.shape[0]
            b = np.zeros(units, np.float32) if spec.get("bias") is None else _as_f32(spec["bias"], f"{where}: bias", 1)
            if w.shape[1] != fan_in:
                below = "the input size is" if i == 0 else f"'{below_name}' gives"
                raise ExportError(
                    f"{where}: weights have {w.shape[1]} columns but {below} {fan_in}"
                    + (" values" if i else "")
                    + " (weights must be [units, inputs]; transpose scikit-learn's coefs_)"
                )
            if b.shape[0] != units:
                raise ExportError(f"{where}: bias has {b.shape[0]} values but the weights have {units} rows")
            entry.update(_parse_activation(spec.get("activation", "identity"), where))
            tensors = {"weights": w, "bias": b}
            shape = ("vector", units)
        elif kind == "conv2d":
            if shape[0] != "map":
                raise ExportError(
                    f"{where}: a conv2d layer needs a spatial map (an image input layout or a map below) "
                    f"but {below_name} gives {_shape_str(shape)}"
                )
            w = _as_f32(spec.get("weights"), f"{where}: weights", 4)
            out_c, in_c, kh, kw = w.shape
            if min(w.shape) == 0:
                raise ExportError(f"{where}: weights have an empty dimension: shape {w.shape}")
            b = np.zeros(out_c, np.float32) if spec.get("bias") is None else _as_f32(spec["bias"], f"{where}: bias", 1)
            if in_c != shape[1]:
                raise ExportError(
                    f"{where}: weights expect {in_c} input channels but '{below_name}' gives {shape[1]}"
                    if i
                    else f"{where}: weights expect {in_c} input channels but the input has {shape[1]}"
                )
            if b.shape[0] != out_c:
                raise ExportError(f"{where}: bias has {b.shape[0]} values but the weights have {out_c} output channels")
            stride = _pair(spec.get("stride", 1), f"{where}: stride", 1)
            padding = _pair(spec.get("padding", 0), f"{where}: padding", 0)
            dilation = _pair(spec.get("dilation", 1), f"{where}: dilation", 1)
            oh = _out_size(shape[2], kh, stride[0], padding[0], dilation[0])
            ow = _out_size(shape[3], kw, stride[1], padding[1], dilation[1])
            if oh < 1 or ow < 1:
                raise ExportError(
                    f"{where}: the {kh} x {kw} kernel (dilation {list(dilation)}) is larger than the padded "
                    f"input {shape[2] + 2 * padding[0]} x {shape[3] + 2 * padding[1]} from {below_name}"
                )
            entry.update(_parse_activation(spec.get("activation", "identity"), where))
            if entry["activation"] == "softmax":
                raise ExportError(f"{where}: softmax is allowed only on a dense output layer")
            entry.update(stride=_pair_json(stride), padding=_pair_json(padding), dilation=_pair_json(dilation))
            tensors = {"weights": w, "bias": b}
            shape = ("map", out_c, oh, ow)
        elif kind in ("max_pool2d", "avg_pool2d"):
            if shape[0] != "map":
                raise ExportError(f"{where}: a {kind} layer needs a spatial map but {below_name} gives {_shape_str(shape)}")
            k = spec.get("kernel")
            if k == "global":
                kernel = (shape[2], shape[3])
            else:
                kernel = _pair(k, f"{where}: kernel", 1)
            stride = _pair(spec.get("stride", list(kernel)), f"{where}: stride", 1)
            padding = _pair(spec.get("padding", 0), f"{where}: padding", 0)
            if padding[0] > kernel[0] // 2 or padding[1] > kernel[1] // 2:
                # PyTorch's own rule: "pad should be at most half of effective kernel size".
                raise ExportError(f"{where}: padding {list(padding)} is more than half the kernel {list(kernel)}")
            oh = _out_size(shape[2], kernel[0], stride[0], padding[0])
            ow = _out_size(shape[3], kernel[1], stride[1], padding[1])
            if oh < 1 or ow < 1:
                raise ExportError(
                    f"{where}: the {kernel[0]} x {kernel[1]} pool gives an empty map on {_shape_str(shape)} "
                    f"from {below_name} (padding {list(padding)})"
                )
            entry.update(kernel=_pair_json(kernel), stride=_pair_json(stride), padding=_pair_json(padding))
            shape = ("map", shape[1], oh, ow)
        else:  # flatten
            if shape[0] != "map":
                raise ExportError(f"{where}: flatten needs a spatial map but {below_name} gives {_shape_str(shape)}")
            shape = ("vector", shape[1] * shape[2] * shape[3])
        for key, t in tensors.items():
            if safetensors_threshold is not None and t.size >= safetensors_threshold:
                tensor = f"{lname}.{'weight' if key == 'weights' else 'bias'}"
                side[tensor] = t
                entry[key] = {"safetensors": None, "tensor": tensor}
            else:
                entry[key] = _f32_list(t)
        entries.append(entry)
        below_name = lname

    if any(e.get("activation") == "softmax" for e in entries[:-1]):
        bad = next(e for e in entries[:-1] if e.get("activation") == "softmax")
        raise ExportError(f"layer '{bad['name']}': softmax is allowed only in the last layer")
    if labels is not None:
        labels = [str(x) for x in labels]
        if entries[-1]["type"] != "dense":
            raise ExportError(f"labels: the last layer '{entries[-1]['name']}' is {entries[-1]['type']}, not dense")
        if len(labels) != shape[1]:
            raise ExportError(f"labels: {len(labels)} labels but the last layer has {shape[1]} units")
        if len(set(labels)) != len(labels):
            raise ExportError("labels: class names must be distinct")
        entries[-1]["labels"] = labels

    spatial = any(e["type"] in SPATIAL_TYPES for e in entries)
    model = {"schema": SCHEMA_V2 if spatial else SCHEMA_V1, "name": str(name)}
    if step is not None:
        model["step"] = _step(step)
    if description is not None:
        model["description"] = str(description)
    model["input"] = inp
    model["layers"] = entries

    if side:
        side_path = Path(safetensors_file) if safetensors_file else path.with_suffix(".safetensors")
        if side_path.is_absolute() or side_path.parent != Path("."):
            # Store the path relative to the JSON file; it must be in the same folder tree.
            try:
                rel = os.path.relpath(side_path.resolve(), path.resolve().parent)
            except ValueError as e:
                raise ExportError(f"safetensors_file {side_path} is on another drive than {path}") from e
            if rel.startswith(".."):
                raise ExportError(
                    f"safetensors_file {side_path} is outside the folder of {path}; "
                    "receptor refuses such paths by default"
                )
            side_path = path.parent / rel
        else:
            rel = side_path.name
            side_path = path.parent / rel
        rel = Path(rel).as_posix()
        for entry in entries:
            for key in ("weights", "bias"):
                if isinstance(entry.get(key), dict):
                    entry[key]["safetensors"] = rel
        try:
            from safetensors.numpy import save_file
        except ImportError as e:
            raise ExportError(
                "writing large tensors needs the 'safetensors' package (pip install safetensors), "
                "or pass safetensors_threshold=None to write everything inline"
            ) from e
        side_path.parent.mkdir(parents=True, exist_ok=True)
        _write_atomic(side_path, lambda tmp: save_file(side, tmp, metadata={"format": "receptor"}))

    def write_json(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(model, fh, separators=(",", ":"))
            fh.write("\n")

    path.parent.mkdir(parents=True, exist_ok=True)
    _write_atomic(path, write_json)
    return path


def _torch_pair(value, where, what):
    """A PyTorch int-or-tuple module argument -> (h, w) ints."""
    if isinstance(value, int):
        return (value, value)
    if isinstance(value, (tuple, list)) and len(value) == 2 and all(isinstance(v, int) for v in value):
        return (int(value[0]), int(value[1]))
    if isinstance(value, (tuple, list)) and len(value) == 1 and isinstance(value[0], int):
        return (value[0], value[0])
    raise ExportError(f"{where}: {what} {value!r} is not supported (expected an integer or a pair)")


def export_torch(
    model,
    input_size=None,
    low=-1.0,
    high=1.0,
    layout=None,
    names=None,
    labels=None,
    *,
    path,
    name="model",
    description=None,
    safetensors_threshold=DEFAULT_SAFETENSORS_THRESHOLD,
    safetensors_file=None,
    units=None,
    step=None,
):
    """Writes a PyTorch ``nn.Sequential`` to ``path``.

    Modules map to layers as follows:

    * ``Linear`` -> ``dense``; ``Conv2d`` (``groups=1``, zero padding; ``padding="same"``
      only when it is symmetric) -> ``conv2d``; the activation module that follows either
      (``ReLU``, ``LeakyReLU``, ``Sigmoid``, ``Tanh``, ``Softmax`` over the features,
      ``Identity``) becomes its activation (none: identity);
    * ``BatchNorm2d`` directly after a ``Conv2d`` and ``BatchNorm1d`` directly after a
      ``Linear`` are folded into it (:func:`fold_batchnorm`, running statistics);
    * ``MaxPool2d`` (no dilation, floor mode) -> ``max_pool2d``; ``AvgPool2d`` (floor mode,
      counting padded cells, no divisor override) -> ``avg_pool2d``; ``AdaptiveAvgPool2d(1)``
      and ``AdaptiveMaxPool2d(1)`` -> a pool over the whole map. An activation right after a
      ``MaxPool2d`` moves onto the ``Conv2d`` before the pool: max pooling commutes with
      every non-decreasing function, so the result is the same;
    * ``Flatten`` (``start_dim=1``) -> ``flatten``; a ``Flatten`` before any other layer acts
      on a flat input and is skipped; ``Dropout`` modules are skipped.

    ``input_size`` defaults to the size of ``layout``, else to the first ``Linear``'s
    ``in_features``; a network starting with a ``Conv2d`` needs ``layout=(height, width,
    channels)``. Layers are named after their modules when those have names, else ``conv1``,
    ``pool1``, ``flatten``, ``h1``, ..., ``out``. Other arguments as in
    :func:`export_arrays`. Raises ``ExportError`` naming the module for anything else.
    """
    try:
        import torch
        from torch import nn
    except ImportError as e:
        raise ExportError("export_torch needs PyTorch (pip install torch)") from e
    if not isinstance(model, nn.Sequential):
        raise ExportError(f"export_torch expects an nn.Sequential, got {type(model).__name__}")

    def arr(t):
        return t.detach().to("cpu", torch.float64).numpy().copy()

    specs = []  # dicts as export_arrays takes them; "activation" None until set
    modules = list(model.named_children())
    for pos, (mname, m) in enumerate(modules):
        where = f"module {pos} ('{mname}', {type(m).__name__})"
        given = None if mname.isdigit() else mname
        if isinstance(m, nn.Linear):
            w = arr(m.weight)
            b = arr(m.bias) if m.bias is not None else np.zeros(w.shape[0])
            specs.append({"name": given, "type": "dense", "weights": w, "bias": b, "activation": None})
            continue
        if isinstance(m, nn.Conv2d):
            if m.groups != 1:
                raise ExportError(f"{where}: groups={m.groups} is not supported (only groups=1)")
            if m.padding_mode != "zeros":
                raise ExportError(f"{where}: padding_mode '{m.padding_mode}' is not supported (only zero padding)")
            kh, kw = m.kernel_size
            dilation = _torch_pair(m.dilation, where, "dilation")
            if isinstance(m.padding, str):
                if m.padding == "valid":
                    padding = (0, 0)
                else:  # "same": PyTorch pads d (k - 1) in total, the odd cell at the bottom/right
                    totals = (dilation[0] * (kh - 1), dilation[1] * (kw - 1))
                    if any(t % 2 for t in totals):
                        raise ExportError(
                            f"{where}: padding='same' with an even kernel pads one side more; "
                            "receptor's zero padding is symmetric"
                        )
                    padding = (totals[0] // 2, totals[1] // 2)
            else:
                padding = _torch_pair(m.padding, where, "padding")
            w = arr(m.weight)
            b = arr(m.bias) if m.bias is not None else np.zeros(w.shape[0])
            specs.append({
                "name": given, "type": "conv2d", "weights": w, "bias": b, "activation": None,
                "stride": _torch_pair(m.stride, where, "stride"), "padding": padding, "dilation": dilation,
            })
            continue
        if isinstance(m, (nn.BatchNorm1d, nn.BatchNorm2d)):
            want = "conv2d" if isinstance(m, nn.BatchNorm2d) else "dense"
            prev = specs[-1] if specs else None
            if prev is None or prev["type"] != want or prev["activation"] is not None or prev.get("_pool"):
                follows = "Conv2d" if want == "conv2d" else "Linear"
                raise ExportError(f"{where}: can only be folded when it directly follows a {follows}")
            if m.running_mean is None or m.running_var is None:
                raise ExportError(f"{where}: has no running statistics (track_running_stats=False); cannot be folded")
            gamma = arr(m.weight) if m.weight is not None else None
            beta = arr(m.bias) if m.bias is not None else None
            try:
                prev["weights"], prev["bias"] = fold_batchnorm(
                    prev["weights"], prev["bias"], gamma, beta, arr(m.running_mean), arr(m.running_var), m.eps
                )
            except ExportError as e:
                raise ExportError(f"{where}: {e}") from e
            continue
        if isinstance(m, (nn.MaxPool2d, nn.AvgPool2d)):
            kind = "max_pool2d" if isinstance(m, nn.MaxPool2d) else "avg_pool2d"
            if m.ceil_mode:
                raise ExportError(f"{where}: ceil_mode=True is not supported")
            padding = _torch_pair(m.padding, where, "padding")
            if isinstance(m, nn.MaxPool2d):
                if _torch_pair(m.dilation, where, "dilation") != (1, 1):
                    raise ExportError(f"{where}: dilation {m.dilation} is not supported")
                if m.return_indices:
                    raise ExportError(f"{where}: return_indices=True is not supported")
            else:
                if not m.count_include_pad and padding != (0, 0):
                    raise ExportError(f"{where}: count_include_pad=False with padding is not supported")
                if m.divisor_override is not None:
                    raise ExportError(f"{where}: divisor_override is not supported")
            kernel = _torch_pair(m.kernel_size, where, "kernel_size")
            stride = kernel if m.stride in (None, ()) else _torch_pair(m.stride, where, "stride")
            specs.append({"name": given, "type": kind, "kernel": kernel, "stride": stride, "padding": padding,
                          "_pool": True})
            continue
        if isinstance(m, (nn.AdaptiveAvgPool2d, nn.AdaptiveMaxPool2d)):
            size = m.output_size
            if size not in (1, (1, 1), [1, 1], (1,)):
                raise ExportError(f"{where}: only output_size=1 (a global pool) is supported, got {size!r}")
            kind = "avg_pool2d" if isinstance(m, nn.AdaptiveAvgPool2d) else "max_pool2d"
            specs.append({"name": given, "type": kind, "kernel": "global", "_pool": True})
            continue
        if isinstance(m, nn.Flatten):
            if not specs:
                continue  # acts on a flat input
            if m.start_dim != 1 or m.end_dim != -1:
                raise ExportError(f"{where}: only Flatten(start_dim=1, end_dim=-1) is supported")
            specs.append({"name": given, "type": "flatten"})
            continue
        if isinstance(m, (nn.Dropout, nn.Dropout1d, nn.Dropout2d, nn.AlphaDropout)):
            continue  # identity at inference
        if isinstance(m, nn.ReLU):
            act = "relu"
        elif isinstance(m, nn.LeakyReLU):
            act = ("leaky_relu", float(m.negative_slope))
        elif isinstance(m, nn.Sigmoid):
            act = "sigmoid"
        elif isinstance(m, nn.Tanh):
            act = "tanh"
        elif isinstance(m, nn.Identity):
            act = "identity"
        elif isinstance(m, nn.Softmax):
            if m.dim not in (None, -1, 1):
                raise ExportError(f"{where}: softmax must be over the features (dim=-1 or 1), got dim={m.dim}")
            act = "softmax"
        else:
            raise ExportError(
                f"{where} is not supported: receptor reads Linear, Conv2d, MaxPool2d, AvgPool2d, "
                "AdaptiveAvgPool2d(1), AdaptiveMaxPool2d(1), Flatten, BatchNorm1d/2d (folded), Dropout "
                "and the activations ReLU, LeakyReLU, Sigmoid, Tanh, Softmax, Identity"
            )
        if not specs:
            raise ExportError(f"{where}: an activation before the first layer is not supported")
        target = specs[-1]
        if target["type"] == "max_pool2d" and act not in ("softmax", "identity"):
            # max(f(z)) = f(max(z)) for non-decreasing f; padded cells are never the max.
            if len(specs) >= 2 and specs[-2]["type"] == "conv2d" and specs[-2]["activation"] is None:
                target = specs[-2]
        if act == "identity" and target["type"] not in ("dense", "conv2d"):
            continue
        if target["type"] not in ("dense", "conv2d"):
            raise ExportError(
                f"{where}: an activation after {target['type']} cannot be written; "
                "put it on the Conv2d or Linear before the pool"
            )
        if target["activation"] is not None:
            if act == "identity":
                continue
            raise ExportError(f"{where}: two activations follow the same layer")
        target["activation"] = act
    if not specs or not any(s["type"] in ("dense", "conv2d") for s in specs):
        raise ExportError("the nn.Sequential has no Linear or Conv2d layer")

    counts = {}
    dense_total = sum(1 for s in specs if s["type"] == "dense")
    dense_seen = 0
    layers = []
    for s in specs:
        s.pop("_pool", None)
        kind = s["type"]
        if kind == "dense":
            dense_seen += 1
        if s["name"] is None:
            if kind == "dense":
                s["name"] = "out" if dense_seen == dense_total and s is specs[-1] else f"h{dense_seen}"
            elif kind == "flatten":
                counts["flatten"] = counts.get("flatten", 0) + 1
                s["name"] = "flatten" if counts["flatten"] == 1 else f"flatten{counts['flatten']}"
            else:
                prefix = "conv" if kind == "conv2d" else "pool"
                counts[prefix] = counts.get(prefix, 0) + 1
                s["name"] = f"{prefix}{counts[prefix]}"
        if kind in ("dense", "conv2d") and s["activation"] is None:
            s["activation"] = "identity"
        layers.append(s)
    if input_size is None:
        if layout is not None and layout != "vector" and layout != {"kind": "vector"}:
            if isinstance(layout, dict):
                dims = (layout.get("height"), layout.get("width"), layout.get("channels", 1))
            else:
                dims = tuple(layout) + ((1,) if len(layout) == 2 else ())
            try:
                input_size = int(np.prod([int(d) for d in dims]))
            except (TypeError, ValueError) as e:
                raise ExportError(f"layout: expected (height, width[, channels]), got {layout!r}") from e
        elif layers[0]["type"] == "dense":
            input_size = layers[0]["weights"].shape[1]
        else:
            raise ExportError(
                f"the network starts with {layers[0]['type']}: pass layout=(height, width, channels)"
            )
    return export_arrays(
        layers,
        input_size,
        low,
        high,
        layout,
        names,
        labels,
        path=path,
        name=name,
        description=description,
        safetensors_threshold=safetensors_threshold,
        safetensors_file=safetensors_file,
        units=units,
        step=step,
    )


#: metadata_props keys receptor reads from an ONNX file (see src/model/onnx/mod.rs).
ONNX_META_LOW = "receptor.low"
ONNX_META_HIGH = "receptor.high"
ONNX_META_LABELS = "receptor.labels"
ONNX_META_NAMES = "receptor.names"
ONNX_META_UNITS = "receptor.units"


def _box_text(value, what):
    """One number, or a list of numbers, as receptor's box text ("-1" or "0,0.5,1")."""
    values = np.atleast_1d(np.asarray(value, dtype=np.float64)).ravel()
    if values.size == 0 or not np.all(np.isfinite(values)):
        raise ExportError(f"{what} must be finite numbers, got {value!r}")
    return ",".join(repr(float(v)) for v in values)


def export_onnx(model, example, *, path, low=-1.0, high=1.0, labels=None, names=None, opset=17,
                units=None):
    """Exports a PyTorch module to ONNX with ``torch.onnx.export`` and writes the input box
    (one number, one per input, or one per image channel) and optional class labels,
    feature names and feature units into the file's ``metadata_props``. ``example`` is an input batch
    (``[N, features]`` or ``[N, C, H, W]``); the batch axis is exported as dynamic. The
    module is put in eval mode (Dropout off, BatchNorm with its running statistics).

    Uses the TorchScript-based exporter (``dynamo=False``), which needs no package beyond
    torch and onnx. Returns the path.
    """
    try:
        import torch
    except ImportError as e:
        raise ExportError("export_onnx needs PyTorch (pip install torch)") from e
    try:
        import onnx
    except ImportError as e:
        raise ExportError("export_onnx needs the onnx package (pip install onnx)") from e
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    model = model.eval()
    meta = {ONNX_META_LOW: _box_text(low, "low"), ONNX_META_HIGH: _box_text(high, "high")}
    if labels is not None:
        meta[ONNX_META_LABELS] = json.dumps([str(x) for x in labels])
    if names is not None:
        meta[ONNX_META_NAMES] = json.dumps([str(x) for x in names])
    if units is not None:
        meta[ONNX_META_UNITS] = json.dumps([str(x) for x in units])

    def write(tmp):
        with torch.no_grad():
            torch.onnx.export(
                model,
                (example,),
                tmp,
                input_names=["input"],
                output_names=["output"],
                dynamic_axes={"input": {0: "batch"}, "output": {0: "batch"}},
                opset_version=opset,
                dynamo=False,
            )
        m = onnx.load(tmp)
        for key, value in meta.items():
            entry = m.metadata_props.add()
            entry.key = key
            entry.value = value
        onnx.save(m, tmp)

    _write_atomic(path, write)
    return path


# --- checkpoints of a training run ---------------------------------------------------------


def checkpoint_path(folder, step, prefix="ckpt"):
    """The JSON file of the checkpoint at ``step``: ``folder/<prefix>-<step>.json``."""
    return Path(folder) / f"{prefix}-{_step(step)}.json"


def save_checkpoint(model, step, folder, *, prefix="ckpt", input_size=None, **options):
    """Writes one checkpoint of a training run and returns the JSON file's path.

    ``model`` is a PyTorch ``nn.Sequential`` (written by :func:`export_torch`) or a list of
    layers as :func:`export_arrays` takes them (then ``input_size`` defaults to the first
    dense layer's number of columns). The JSON file is ``folder/<prefix>-<step>.json`` with
    the top-level ``"step"`` set; every tensor, biases included, goes to the safetensors
    side file ``folder/<prefix>-<step>.safetensors`` (needs the ``safetensors`` package).
    ``options`` are those of :func:`export_arrays` / :func:`export_torch` (``low``,
    ``high``, ``layout``, ``names``, ``labels``, ``name``, ``description``). Both files are
    written through a temporary file and renamed, so a reader never sees half a checkpoint
    file.
    """
    for fixed in ("path", "step", "safetensors_threshold", "safetensors_file"):
        if fixed in options:
            raise ExportError(f"save_checkpoint sets {fixed} itself")
    path = checkpoint_path(folder, step, prefix)
    common = dict(options, path=path, step=_step(step), safetensors_threshold=0)
    if isinstance(model, (list, tuple)):
        if input_size is None:
            first = model[0] if model else None
            if isinstance(first, (list, tuple)) and len(first) == 4:
                input_size = np.asarray(first[1]).shape[-1]
            else:
                raise ExportError("save_checkpoint: pass input_size= for a network that does not start with a dense layer")
        return export_arrays(model, input_size, **common)
    return export_torch(model, input_size, **common)


class CheckpointWriter:
    """Writes a checkpoint every ``every`` training steps, for ``receptor timeline``.

    ``writer = CheckpointWriter("run1", every=100, low=0.0, high=1.0)``, then in the training
    loop ``writer(model, step)``: when ``step`` is a multiple of ``every`` (step 0
    included) it calls :func:`save_checkpoint` and returns the JSON file's path, else it
    returns ``None``. ``writer.save(model, step)`` writes one whatever the step (the last
    step of a run, say). ``writer.written`` lists the files written, in order. Options as in
    :func:`save_checkpoint`.
    """

    def __init__(self, folder, every, *, prefix="ckpt", **options):
        if isinstance(every, bool) or not isinstance(every, (int, np.integer)) or every < 1:
            raise ExportError(f"every must be a whole number of steps from 1, not {every!r}")
        self.folder = Path(folder)
        self.every = int(every)
        self.prefix = prefix
        self.options = options
        self.written = []

    def __call__(self, model, step):
        if _step(step) % self.every != 0:
            return None
        return self.save(model, step)

    def save(self, model, step):
        """Writes the checkpoint at ``step`` now; returns the JSON file's path."""
        path = save_checkpoint(model, step, self.folder, prefix=self.prefix, **self.options)
        self.written.append(path)
        return path
