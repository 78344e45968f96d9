"""Model.from_torch. torch is not installed in CI (its Linux wheels bring several GB of GPU libraries),
so the conversion is tested on stand-in objects exposing the attributes the converter reads from
torch modules: a ``Sequential`` iterable of ``Linear`` (``weight`` out × in, ``bias``), ``ReLU``,
``Flatten``, ``Dropout``; tensors with ``detach()``, ``cpu()``, ``numpy()``. The reference is a plain
numpy forward pass of the same weights (y = W x + b, ReLU = max(0, ·), as torch.nn defines them).
When torch is installed, the real module is converted and compared with its own forward pass."""

from __future__ import annotations

import numpy as np
import pytest

import ballast


class Tensor:
    def __init__(self, values):
        self.values = np.asarray(values, dtype=np.float32)

    def detach(self):
        return self

    def cpu(self):
        return self

    def numpy(self):
        return self.values


class Linear:
    def __init__(self, rng, n_in, n_out, bias=True):
        self.in_features, self.out_features = n_in, n_out
        self.weight = Tensor(rng.normal(size=(n_out, n_in)) / np.sqrt(n_in))
        self.bias = Tensor(rng.normal(size=n_out) * 0.1) if bias else None


class ReLU:
    pass


class Flatten:
    pass


class Dropout:
    pass


class Sequential:
    def __init__(self, *layers):
        self.layers = list(layers)

    def __iter__(self):
        return iter(self.layers)


def reference_forward(seq, X):
    h = X.reshape(len(X), -1)
    for layer in seq:
        if isinstance(layer, Linear):
            b = layer.bias.values.astype(np.float64) if layer.bias is not None else 0.0
            h = h @ layer.weight.values.astype(np.float64).T + b
        elif isinstance(layer, ReLU):
            h = np.maximum(h, 0.0)
    return h


def test_stand_in_sequential_matches_numpy_forward_pass():
    rng = np.random.default_rng(3)
    seq = Sequential(Flatten(), Linear(rng, 12, 16), ReLU(), Dropout(), Linear(rng, 16, 8, bias=False), ReLU(),
                     Linear(rng, 8, 4))
    X = rng.normal(size=(50, 3, 4))
    model = ballast.Model.from_torch(seq, (3, 4), input_range=(-5, 5))
    np.testing.assert_allclose(model.logits(X.reshape(50, -1)), reference_forward(seq, X), rtol=1e-12, atol=1e-12)
    assert np.array_equal(model.predict(X.reshape(50, -1)), reference_forward(seq, X).argmax(axis=1))
    assert model.input_dim == 12
    report = ballast.certify(model, np.clip(X.reshape(50, -1), -5, 5), model.predict(np.clip(X.reshape(50, -1), -5, 5)),
                             eps=0.01)
    assert report.misclassified == 0


def test_unsupported_layers_are_named():
    rng = np.random.default_rng(0)

    class Tanh:
        pass

    with pytest.raises(ballast.InputError, match=r"^layer 1 \(Tanh\): not supported"):
        ballast.Model.from_torch(Sequential(Linear(rng, 3, 3), Tanh(), Linear(rng, 3, 2)), (3,))
    with pytest.raises(ballast.InputError, match=r"weight of shape \(3, 3\), expected \(out, 4\)"):
        ballast.Model.from_torch(Sequential(Linear(rng, 3, 3)), (4,))
    with pytest.raises(ballast.InputError, match="add nn.Flatten"):
        ballast.Model.from_torch(Sequential(Linear(rng, 4, 2)), (2, 2))
    with pytest.raises(ballast.InputError, match="^list: not supported, expected an nn.Sequential"):
        ballast.Model.from_torch([Linear(rng, 4, 2)], (4,))


def test_real_torch_module_when_installed():
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    seq = torch.nn.Sequential(torch.nn.Linear(5, 7), torch.nn.ReLU(), torch.nn.Linear(7, 3))
    X = np.random.default_rng(1).normal(size=(20, 5))
    model = ballast.Model.from_torch(seq, (5,))
    with torch.no_grad():
        expected = seq(torch.tensor(X, dtype=torch.float64).to(torch.float32)).double().numpy()
    np.testing.assert_allclose(model.logits(X), expected, rtol=1e-5, atol=1e-5)
