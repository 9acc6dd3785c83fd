"""Tasks composed from a named dataset and a named model: the building blocks of recipe tasks.

A dataset is a whole labelled table (or image set) built offline: scikit-learn's bundled
sets (``load_*`` only) or data generated here from a fixed seed. :func:`compose_task`
splits it by the trial's seed, standardizes tabular features with training statistics,
builds the model from the data's shape and returns an ordinary :class:`TaskInstance`::

    task = compose_task("wine", "mlp", seed=0, batch_size=32)
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from .base import Batch, LossFn, TaskInstance, seeded_module, split_indices, supervised_instance

__all__ = [
    "DATASETS",
    "LOSSES",
    "MODELS",
    "Dataset",
    "DatasetSpec",
    "accuracy",
    "compose_task",
    "load_dataset",
    "make_model",
]


@dataclass(frozen=True)
class Dataset:
    """A whole dataset before splitting.

    Attributes:
        x: inputs, float32; ``(n, features)`` or ``(n, channels, height, width)`` for images.
        y: int64 class labels (classification) or float32 targets (regression).
        classes: number of classes; 0 for regression.
        standardize: whether features are standardized with training statistics.
    """

    x: Tensor
    y: Tensor
    classes: int
    standardize: bool = True

    @property
    def is_image(self) -> bool:
        """Whether inputs are images ``(n, c, h, w)``."""
        return self.x.dim() == 4


@dataclass(frozen=True)
class DatasetSpec:
    """A named dataset and how it is made."""

    name: str
    description: str
    load: Callable[[], Dataset]


def _sklearn(loader: str, regression: bool = False) -> Dataset:
    import sklearn.datasets  # optional dependency: imported lazily; bundled sets only

    data = getattr(sklearn.datasets, loader)()
    x = torch.tensor(data.data, dtype=torch.float32)
    if regression:
        y = torch.tensor(data.target, dtype=torch.float32)
        return Dataset(x, (y - y.mean()) / y.std(), 0)
    y = torch.tensor(data.target, dtype=torch.int64)
    return Dataset(x, y, int(y.max()) + 1)


def _digits() -> Dataset:
    import sklearn.datasets

    data = sklearn.datasets.load_digits()
    x = torch.tensor(data.images, dtype=torch.float32).unsqueeze(1) / 16.0
    return Dataset(x, torch.tensor(data.target, dtype=torch.int64), 10, standardize=False)


#: Size of the generated benchmark.
TWISTED_ROWS = 40_000
TWISTED_FEATURES = 16
TWISTED_CLASSES = 8
_TWISTED_SEED = 20240917


def _twisted_clusters() -> Dataset:
    """Generated: 40 000 rows, 16 features, 8 classes; Gaussian clusters bent by a sine warp.

    Each class is a cluster around a random centre; every point is then warped by
    ``x + 0.8 sin(1.5 x W)`` with a fixed random ``W``, so the classes overlap a little and
    their borders are curved: a linear model plateaus well above what an MLP reaches.
    The data is the same for every seed (the split is not).
    """
    gen = torch.Generator().manual_seed(_TWISTED_SEED)
    centres = 1.2 * torch.randn(TWISTED_CLASSES, TWISTED_FEATURES, generator=gen)
    y = torch.randint(0, TWISTED_CLASSES, (TWISTED_ROWS,), generator=gen)
    x = centres[y] + 1.5 * torch.randn(TWISTED_ROWS, TWISTED_FEATURES, generator=gen)
    w = torch.randn(TWISTED_FEATURES, TWISTED_FEATURES, generator=gen) / math.sqrt(TWISTED_FEATURES)
    x = x + 0.8 * torch.sin(1.5 * x @ w)
    return Dataset(x, y, TWISTED_CLASSES)


def _raw_features() -> Dataset:
    from .tabular import _raw_data

    x, y = _raw_data()
    return Dataset(x, y, 0, standardize=False)


#: Every dataset, by name.
DATASETS: dict[str, DatasetSpec] = {
    spec.name: spec
    for spec in (
        DatasetSpec("digits", "scikit-learn 8x8 digits: 1797 images, 10 classes", _digits),
        DatasetSpec(
            "breast_cancer", "scikit-learn breast cancer: 569 x 30, 2 classes", lambda: _sklearn("load_breast_cancer")
        ),
        DatasetSpec("wine", "scikit-learn wine: 178 x 13, 3 classes", lambda: _sklearn("load_wine")),
        DatasetSpec("iris", "scikit-learn iris: 150 x 4, 3 classes", lambda: _sklearn("load_iris")),
        DatasetSpec(
            "diabetes",
            "scikit-learn diabetes: 442 x 10, regression (target standardized)",
            lambda: _sklearn("load_diabetes", regression=True),
        ),
        DatasetSpec(
            "twisted_clusters",
            f"generated: {TWISTED_ROWS} x {TWISTED_FEATURES}, {TWISTED_CLASSES} warped Gaussian clusters",
            _twisted_clusters,
        ),
        DatasetSpec(
            "raw_features", "generated: 2048 x 12 raw features scaled 1e-2..1e3, linear regression", _raw_features
        ),
    )
}


@lru_cache(maxsize=8)
def load_dataset(name: str) -> Dataset:
    """The dataset called ``name`` (cached per process)."""
    if name not in DATASETS:
        raise KeyError(f"Unknown dataset: {name!r}; expected one of {', '.join(DATASETS)}")
    return DATASETS[name].load()


def _cnn(channels: int, side: int, outputs: int) -> nn.Module:
    return nn.Sequential(
        nn.Conv2d(channels, 16, 3, padding=1),
        nn.ReLU(),
        nn.Conv2d(16, 32, 3, padding=1),
        nn.ReLU(),
        nn.MaxPool2d(2),
        nn.Flatten(),
        nn.Linear(32 * (side // 2) ** 2, outputs),
    )


def _mlp(inputs: int, hidden: Sequence[int], outputs: int) -> nn.Module:
    layers: list[nn.Module] = [nn.Flatten()]
    width = inputs
    for h in hidden:
        layers += [nn.Linear(width, h), nn.ReLU()]
        width = h
    layers.append(nn.Linear(width, outputs))
    return nn.Sequential(*layers)


#: Every model, by name, with a one-line description.
MODELS: dict[str, str] = {
    "linear": "one linear layer (logistic / linear regression)",
    "mlp": "ReLU multilayer perceptron (hidden widths from the recipe, default 128, 64)",
    "cnn": "two 3x3 convolutions (16, 32 channels), 2x2 max-pool, linear head (image datasets)",
}


def make_model(name: str, data: Dataset, hidden: Sequence[int] = (128, 64)) -> nn.Module:
    """Build model ``name`` for ``data`` (uses the global RNG: wrap in :func:`seeded_module`)."""
    outputs = max(data.classes, 1)
    inputs = int(torch.tensor(data.x.shape[1:]).prod())
    if name == "linear":
        return _mlp(inputs, (), outputs)
    if name == "mlp":
        return _mlp(inputs, hidden, outputs)
    if name == "cnn":
        if not data.is_image:
            raise ValueError("model 'cnn' needs an image dataset (such as 'digits')")
        return _cnn(data.x.shape[1], data.x.shape[2], outputs)
    raise KeyError(f"Unknown model: {name!r}; expected one of {', '.join(MODELS)}")


def _cross_entropy(model: nn.Module, batch: Batch) -> Tensor:
    x, y = batch
    return F.cross_entropy(model(x), y)


def _mse(model: nn.Module, batch: Batch) -> Tensor:
    x, y = batch
    return F.mse_loss(model(x).squeeze(-1), y)


#: Training objectives by name (``auto`` picks by dataset: cross-entropy or squared error).
LOSSES: dict[str, LossFn] = {"cross_entropy": _cross_entropy, "mse": _mse}


def accuracy(x: Tensor, y: Tensor, chunk: int = 4096) -> Callable[[nn.Module], float]:
    """An evaluator: the fraction of rows whose arg-max output is the label."""

    def evaluate(model: nn.Module) -> float:
        was_training = model.training
        model.eval()
        right = 0
        with torch.no_grad():
            for start in range(0, x.shape[0], chunk):
                out = model(x[start : start + chunk])
                right += int((out.argmax(-1) == y[start : start + chunk]).sum())
        model.train(was_training)
        return right / max(x.shape[0], 1)

    return evaluate


def compose_task(
    dataset: str,
    model: str,
    seed: int,
    *,
    batch_size: int = 64,
    hidden: Sequence[int] = (128, 64),
    loss: str = "auto",
    test_fraction: float = 0.2,
    steps: int = 300,
) -> TaskInstance:
    """A seeded task: ``dataset`` split by ``seed``, ``model`` initialized from ``seed``.

    Tabular features are standardized with the training rows' mean and deviation.
    Classification tasks also report ``train_accuracy`` and ``test_accuracy``.
    """
    data = load_dataset(dataset)
    train, test = split_indices(data.x.shape[0], 1.0 - test_fraction, seed)
    x_all = data.x
    if data.standardize and not data.is_image:
        mean, std = x_all[train].mean(0), x_all[train].std(0).clamp_min(1e-8)
        x_all = (x_all - mean) / std
    if loss == "auto":
        loss = "cross_entropy" if data.classes else "mse"
    if loss not in LOSSES:
        raise KeyError(f"Unknown loss: {loss!r}; expected 'auto' or one of {', '.join(LOSSES)}")
    if loss == "cross_entropy" and not data.classes:
        raise ValueError(f"loss 'cross_entropy' needs a classification dataset; {dataset!r} is a regression set")
    loss_fn = LOSSES[loss]
    net = seeded_module(seed, lambda: make_model(model, data, hidden))
    xs, ys, xt, yt = x_all[train], data.y[train], x_all[test], data.y[test]
    metrics: dict[str, Callable[[nn.Module], float]] = {}
    if data.classes:
        metrics = {"train_accuracy": accuracy(xs, ys), "test_accuracy": accuracy(xt, yt)}
    return supervised_instance(
        f"{model}_{dataset}",
        net,
        loss_fn,
        (xs, ys),
        (xt, yt),
        batch_size=batch_size,
        seed=seed,
        steps=steps,
        metrics=metrics,
        epochs=True,
    )
