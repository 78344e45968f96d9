"""PyTorch ``nn.Sequential`` models as ballast models (the ``ballast.model/1`` layout, built in memory).

The weights are read directly from the modules (``weight``/``bias`` tensors, detached and copied to
the CPU as float64); nothing is traced or exported. ``torch`` itself is imported only to confirm the
module is a ``torch.nn.Module`` when it is installed; the conversion reads attributes by the layer's
class name, so it needs no torch import.

Supported layers: ``Linear``, ``ReLU``, ``Flatten`` (on the input: the sample is flattened in C order, as
``torch.flatten`` does), and the no-ops of an evaluated network: ``Identity`` and ``Dropout``. A
``Linear`` weight is out × in, one row per output unit, as the layout wants. Anything else is refused
with the layer's position and class name.
"""

from __future__ import annotations

import json
from typing import Any, Sequence

import numpy as np

from . import _native

__all__ = ["layout_from_torch"]

_NO_OPS = ("Identity", "Dropout", "Dropout1d", "AlphaDropout")


def _array(tensor: Any) -> np.ndarray:
    if hasattr(tensor, "detach"):
        tensor = tensor.detach()
    if hasattr(tensor, "cpu"):
        tensor = tensor.cpu()
    if hasattr(tensor, "numpy"):
        tensor = tensor.numpy()
    return np.asarray(tensor, dtype=np.float64)


def _modules(module: Any) -> list:
    kind = type(module).__name__
    if kind != "Sequential":
        raise _native.InputError(
            f"{kind}: not supported, expected an nn.Sequential of Linear, ReLU, Flatten, Identity and Dropout"
        )
    return list(module)


def layout_from_torch(module: Any, input_shape: Sequence[int], name: str | None = None,
                      feature_names: Any = None) -> str:
    """The ``ballast.model/1`` JSON text of an ``nn.Sequential`` (see the module docstring)."""
    try:  # optional: confirm it is a torch module when torch is installed
        import torch  # noqa: F401

        if not isinstance(module, torch.nn.Module):
            raise _native.InputError(f"{type(module).__name__}: not a torch.nn.Module")
    except ImportError:
        pass
    shape = [int(s) for s in input_shape]
    if not shape or any(s <= 0 for s in shape):
        raise _native.InputError(
            f"input_shape: {tuple(input_shape)} is not allowed, expected positive sizes of one sample (no batch axis)"
        )
    dim = int(np.prod(shape))
    width = dim
    flat = len(shape) == 1
    layers: list[dict] = []
    for position, layer in enumerate(_modules(module)):
        kind = type(layer).__name__
        place = f"layer {position} ({kind})"
        if kind == "Linear":
            if not flat:
                raise _native.InputError(
                    f"{place}: the input has shape {tuple(shape)}; add nn.Flatten() before the first Linear"
                )
            weight = _array(layer.weight)
            if weight.ndim != 2 or weight.shape[1] != width:
                raise _native.InputError(
                    f"{place}: weight of shape {weight.shape}, expected (out, {width})"
                )
            bias = _array(layer.bias) if getattr(layer, "bias", None) is not None else np.zeros(weight.shape[0])
            layers.append({"kind": "dense", "weights": weight.tolist(), "bias": bias.reshape(-1).tolist()})
            width = weight.shape[0]
        elif kind == "ReLU":
            layers.append({"kind": "relu"})
        elif kind == "Flatten":
            if layers:
                raise _native.InputError(f"{place}: only a Flatten of the input is supported")
            flat = True
        elif kind in _NO_OPS:
            continue
        else:
            raise _native.InputError(
                f"{place}: not supported, expected Linear, ReLU, Flatten, Identity or Dropout"
            )
    if not any(layer["kind"] == "dense" for layer in layers):
        raise _native.InputError("the Sequential has no Linear layer")
    layout: dict = {"format": "ballast.model/1"}
    if name is not None:
        layout["name"] = name
    layout["input"] = {"dim": dim}
    if feature_names is not None:
        if len(feature_names) != dim:
            raise _native.InputError(f"feature_names: {len(feature_names)} names, expected {dim} (one per input)")
        layout["input"]["names"] = [str(n) for n in feature_names]
    layout["layers"] = layers
    layout["provenance"] = {"converted_from": "torch.nn.Sequential", "input_shape": shape}
    return json.dumps(layout)
