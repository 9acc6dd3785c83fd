"""Argument documentation shared by every tower optimizer (written once, reused)."""

TOWER_ARGS = """        depth: number of levels above the base; 0 is a plain fixed-rate optimizer
            (default: the measured :data:`stepsize_tower.defaults.DEFAULT_DEPTH`).
        levels: the levels themselves, level 1 first: :class:`Level` objects or kind names
            (``"adam"``, ``"sgd"``); the last level's ``lr`` is fixed (default: measured
            defaults, :func:`stepsize_tower.defaults.default_levels`).
        granularity: ``"group"`` learns one step size per parameter group, ``"tensor"``
            one per parameter tensor (default: ``"group"``).
        retreat: during the first steps, when the next gradient shows the loss rose along
            the last step, take it back and redo it with the secant step size; for SGD,
            also at any step when the gradient blows up past 10x its peak (default: True).
        horizon: decay γ of the trail of recent updates that the step size's hypergradient
            is taken against; 0 is the one-step-back hypergradient (default: measured,
            :func:`stepsize_tower.defaults.default_horizon`: 0.99, or 0 for SGD with momentum).
        maximize: maximize the objective instead of minimizing it (default: False).
        sharded: the group's parameters are split over the ranks of the default process
            group (``torch.distributed.optim.ZeroRedundancyOptimizer``, FSDP2
            ``fully_shard``): every dot product (and the largest gradient entry, and the
            finiteness test) is all-reduced across ranks before the step size moves, so all
            ranks learn the same step size. Needs ``granularity="group"``. Does nothing (no
            collective call) when ``torch.distributed`` is not initialized. Not needed under
            ``DistributedDataParallel``, whose gradients are already all-reduced
            (default: False).

    .. note::
        Step sizes are learned in log space (``a = lr * exp(u)``), so they stay positive
        without clamping, and ``lr`` is an outer factor: a learning-rate scheduler that
        rewrites ``group["lr"]`` rescales the learned step size instead of replacing it.
        :meth:`step_sizes` returns the values in use."""
