#!/usr/bin/env python3
"""Write a trained feed-forward network in receptor's model schema "receptor-model/1".

Two ways in:

* ``export_arrays(layers, input_size, low, high, path=...)`` from numpy arrays, where each
  layer is ``(name, weights, bias, activation)`` with ``weights`` shaped ``[units, inputs]``
  (one row per unit: the orientation of PyTorch's ``nn.Linear.weight``; transpose
  scikit-learn's ``coefs_``, which are ``[inputs, units]``).
* ``export_torch(model, path=...)`` from a PyTorch ``nn.Sequential`` of ``Linear`` layers and
  activation modules (``ReLU``, ``LeakyReLU``, ``Sigmoid``, ``Tanh``, ``Softmax``,
  ``Identity``; ``Flatten`` at the start and ``Dropout`` are accepted, as they do nothing to
  a trained model's inference on flat inputs).
* ``export_onnx(model, example, path=..., low=..., high=...)``: any PyTorch module through
  ``torch.onnx.export``, with the input box (and class labels) written into the ONNX file's
  ``metadata_props`` under ``receptor.low``, ``receptor.high``, ``receptor.labels`` and
  ``receptor.names``; receptor opens the ``.onnx`` file directly (needs the ``onnx`` package).

Tensors with at least ``safetensors_threshold`` elements are written to a safetensors side
file next to the JSON file (needs the ``safetensors`` package from PyPI) and referenced by a
relative path; smaller ones are written inline. Everything is stored as float32.

Requires numpy; torch only for ``export_torch`` and ``export_onnx``, onnx only for
``export_onnx`` (imported there, not at module load).

Example::

    import torch.nn as nn
    from receptor_export import export_torch
    net = nn.Sequential(nn.Linear(64, 32), nn.ReLU(), nn.Linear(32, 5), nn.Softmax(dim=1))
    export_torch(net, path="model.json", low=-1.0, high=1.0, layout=(8, 8, 1))
    # or, through ONNX, in one line:
    export_onnx(net, torch.zeros(1, 64), path="model.onnx", low=-1.0, high=1.0)
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np

SCHEMA = "receptor-model/1"

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
):
    """Writes a network given as arrays to ``path`` (JSON) in the receptor-model/1 schema.

    layers: list of ``(name, weights [units, inputs], bias [units], activation)``; the
        activation is a name (``identity``, ``relu``, ``leaky_relu``, ``sigmoid`` (or
        ``logistic``), ``tanh``, ``softmax`` (last layer only)) or ``("leaky_relu", alpha)``.
    input_size: number of inputs; the first layer's weights must have that many columns.
    low, high: the input box, one number or ``input_size`` numbers each.
    layout: ``None``/``"vector"`` or ``(height, width[, channels])`` for an image patch
        (row-major, channel last).
    names: optional feature names, ``input_size`` strings.
    labels: optional class names for the last layer's units.
    path: the JSON file to write; a side file (default ``<stem>.safetensors`` beside it)
        receives every tensor with at least ``safetensors_threshold`` elements. Use
        ``safetensors_threshold=None`` to write everything inline.

    Returns the path of the JSON file. Raises ``ExportError`` (a ``ValueError``) naming the
    layer and the shapes when the network does not fit the schema; nothing is written then.
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

    seen = set()
    fan_in = input_size
    entries, side = [], {}
    for i, layer in enumerate(layers):
        if len(layer) != 4:
            raise ExportError(f"layer {i}: expected (name, weights, bias, activation), got {len(layer)} items")
        lname, w, b, act = layer
        lname = str(lname)
        where = f"layer '{lname}'"
        if not lname:
            raise ExportError(f"layer {i}: the name is empty")
        if lname in seen:
            raise ExportError(f"{where}: the name is used twice (layer names must be unique)")
        seen.add(lname)
        w = _as_f32(w, f"{where}: weights", 2)
        b = _as_f32(b, f"{where}: bias", 1)
        units = w.shape[0]
        if w.shape[1] != fan_in:
            below = "the input size is" if i == 0 else "the layer below has"
            raise ExportError(
                f"{where}: weights have {w.shape[1]} columns but {below} {fan_in}"
                + (" units" if i else "")
                + " (weights must be [units, inputs]; transpose scikit-learn's coefs_)"
            )
        if b.shape[0] != units:
            raise ExportError(f"{where}: bias has {b.shape[0]} values but the weights have {units} rows")
        entry = {"name": lname, "type": "dense"}
        entry.update(_parse_activation(act, where))
        if entry["activation"] == "softmax" and i != len(layers) - 1:
            raise ExportError(f"{where}: softmax is allowed only in the last layer")
        for key, t in (("weights", w), ("bias", b)):
            if safetensors_threshold is not None and t.size >= safetensors_threshold:
                tensor = f"{lname}.{'weight' if key == 'weights' else 'bias'}"
                side[tensor] = t
                entry[key] = {"safetensors": None, "tensor": tensor}
            else:
                entry[key] = _f32_list(t)
        entries.append(entry)
        fan_in = units

    if labels is not None:
        labels = [str(x) for x in labels]
        if len(labels) != fan_in:
            raise ExportError(f"labels: {len(labels)} labels but the last layer has {fan_in} units")
        if len(set(labels)) != len(labels):
            raise ExportError("labels: class names must be distinct")
        entries[-1]["labels"] = labels

    model = {"schema": SCHEMA, "name": str(name)}
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
                if isinstance(entry[key], dict):
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
):
    """Writes a PyTorch ``nn.Sequential`` of ``Linear`` and activation modules to ``path``.

    Each ``Linear`` starts a layer; the activation module that follows it (``ReLU``,
    ``LeakyReLU``, ``Sigmoid``, ``Tanh``, ``Softmax`` over the last dimension, ``Identity``)
    becomes that layer's activation (none: identity). A leading ``Flatten`` and ``Dropout``
    modules are skipped. ``input_size`` defaults to the first ``Linear``'s ``in_features``.
    Other arguments as in :func:`export_arrays`. Raises ``ExportError`` naming the module for
    anything else (convolutions, normalisation layers, two activations in a row, ...).
    """
    try:
        import torch
        from torch import nn
    except ImportError as e:
        raise ExportError("export_torch needs PyTorch (pip install torch)") from e
    if not isinstance(model, nn.Sequential):
        raise ExportError(f"export_torch expects an nn.Sequential, got {type(model).__name__}")

    layers = []  # [name, weights, bias, activation or None]
    modules = list(model.named_children())
    for pos, (mname, m) in enumerate(modules):
        where = f"module {pos} ('{mname}', {type(m).__name__})"
        if isinstance(m, nn.Linear):
            with torch.no_grad():
                w = m.weight.detach().to("cpu", torch.float32).numpy().copy()
                if m.bias is not None:
                    b = m.bias.detach().to("cpu", torch.float32).numpy().copy()
                else:
                    b = np.zeros(w.shape[0], dtype=np.float32)
            lname = mname if not mname.isdigit() else None
            layers.append([lname, w, b, None])
            continue
        if isinstance(m, nn.Flatten):
            if layers:
                raise ExportError(f"{where}: Flatten is supported only before the first Linear")
            continue
        if isinstance(m, nn.Dropout):
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
                f"{where} is not supported: receptor reads dense feed-forward networks "
                "(Linear with ReLU, LeakyReLU, Sigmoid, Tanh, Softmax or Identity)"
            )
        if not layers:
            raise ExportError(f"{where}: an activation before the first Linear is not supported")
        if layers[-1][3] is not None:
            if act == "identity":
                continue
            raise ExportError(f"{where}: two activations follow the same Linear")
        layers[-1][3] = act
    if not layers:
        raise ExportError("the nn.Sequential has no Linear layer")

    named = []
    for i, (lname, w, b, act) in enumerate(layers):
        if lname is None:
            lname = "out" if i == len(layers) - 1 else f"h{i + 1}"
        named.append((lname, w, b, act or "identity"))
    if input_size is None:
        input_size = named[0][1].shape[1]
    return export_arrays(
        named,
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
    )


#: metadata_props keys receptor reads from an ONNX file (see src/model/onnx/mod.rs).
ONNX_META_LOW = "receptor.low"
ONNX_META_HIGH = "receptor.high"
ONNX_META_LABELS = "receptor.labels"
ONNX_META_NAMES = "receptor.names"


def _box_text(value, what):
    """One number, or a list of numbers, as receptor's box text ("-1" or "0,0.5,1")."""
    values = np.atleast_1d(np.asarray(value, dtype=np.float64)).ravel()
    if values.size == 0 or not np.all(np.isfinite(values)):
        raise ExportError(f"{what} must be finite numbers, got {value!r}")
    return ",".join(repr(float(v)) for v in values)


def export_onnx(model, example, *, path, low=-1.0, high=1.0, labels=None, names=None, opset=17):
    """Exports a PyTorch module to ONNX with ``torch.onnx.export`` and writes the input box
    (one number, one per input, or one per image channel) and optional class labels and
    feature names into the file's ``metadata_props``. ``example`` is an input batch
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
