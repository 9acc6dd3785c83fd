"""stepsize_tower: PyTorch optimizers that learn their own step size by hypergradient descent.

Drop-in replacements for ``torch.optim`` optimizers::

    optimizer = stepsize_tower.TowerAdam(model.parameters(), lr=1e-3)   # any lr

Each level of the tower learns the step size of the level below it; ``depth=0`` is the
plain fixed-rate optimizer.
"""

from .adam import TowerAdam, TowerAdamW
from .factory import make_tower
from .levels import Level
from .options import DEFAULT_DEPTH, default_levels
from .sgd import TowerSGD
from .tower import TowerOptimizer

__all__ = [
    "DEFAULT_DEPTH",
    "Level",
    "TowerAdam",
    "TowerAdamW",
    "TowerOptimizer",
    "TowerSGD",
    "default_levels",
    "make_tower",
]

__version__ = "0.1.0"
