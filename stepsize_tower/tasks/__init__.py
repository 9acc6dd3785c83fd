"""Built-in CPU training tasks: small, seeded, offline problems for benchmarks and recipes.

Each task builds, from a seed, a fresh model, a deterministic minibatch stream, its
loss and a whole-training-set evaluator::

    from stepsize_tower.tasks import get_task, train
    task = get_task("mlp_digits").build(seed=0)
    result = train(task, torch.optim.Adam(task.model.parameters(), lr=1e-3), task.default_steps)

Data comes only from scikit-learn's bundled sets (``load_*``; scikit-learn is an optional
dependency, imported when a task is built), local generation, or Python's own
docstrings. Nothing is downloaded.
"""

from __future__ import annotations

from .base import Batch, LossFn, TaskInstance, TaskSpec
from .charlm import build_char_gru
from .compose import DATASETS, MODELS, compose_task
from .digits import build_cnn_digits, build_mlp_digits
from .tabular import build_least_squares_raw, build_logistic_cancer
from .train import TrainResult, train

__all__ = [
    "DATASETS",
    "MODELS",
    "TASKS",
    "Batch",
    "LossFn",
    "TaskInstance",
    "TaskSpec",
    "TrainResult",
    "compose_task",
    "get_task",
    "task_names",
    "train",
]

#: Every built-in task, by name, in benchmark order.
TASKS: dict[str, TaskSpec] = {
    spec.name: spec
    for spec in (
        TaskSpec("logreg_cancer", "logistic regression, breast cancer, standardized (convex)", build_logistic_cancer),
        TaskSpec(
            "lsq_raw", "least squares, raw features scaled 1e-2..1e3 (convex, ill-conditioned)", build_least_squares_raw
        ),
        TaskSpec("mlp_digits", "ReLU MLP on 8x8 digits", build_mlp_digits),
        TaskSpec("cnn_digits", "small convolutional net on 8x8 digits", build_cnn_digits),
        TaskSpec("char_gru", "character-level GRU language model on Python docstrings", build_char_gru),
        TaskSpec(
            "mlp_wine", "ReLU MLP on the wine set (178 rows, 3 classes)", lambda seed: _composed("wine", seed, 32)
        ),
        TaskSpec(
            "linreg_diabetes",
            "linear regression on the diabetes set (442 rows)",
            lambda seed: compose_task("diabetes", "linear", seed, batch_size=32),
        ),
        TaskSpec(
            "mlp_clusters",
            "ReLU MLP on 40 000 generated warped-cluster rows (8 classes)",
            lambda seed: _composed("twisted_clusters", seed, 128),
        ),
    )
}


def _composed(dataset: str, seed: int, batch_size: int) -> TaskInstance:
    return compose_task(dataset, "mlp", seed, batch_size=batch_size)


def task_names() -> list[str]:
    """The built-in task names, in benchmark order."""
    return list(TASKS)


def get_task(name: str) -> TaskSpec:
    """The task called ``name``; raises ``KeyError`` naming the known tasks otherwise."""
    try:
        return TASKS[name]
    except KeyError:
        raise KeyError(f"Unknown task: {name!r}; expected one of {', '.join(TASKS)}") from None
