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
        growth_search: opt-in start-up search for a step size typed far too small, for
            full-batch or large-batch runs: while every step so far kept at least half the
            loss's slope along it, level 1's growth of ``log a_0`` is sped up by
            ``stepsize_tower.levels.SEARCH_SPEEDUP ** n`` at the search's step ``n``, by at
            most this much per step (0.5 is a factor 1.65); the first step that fails the
            test, or a retreat, ends it for good. Under minibatch noise the test fails within
            a few steps, so it rarely helps there (measured; see the README) (default:
            None, off).
        maximize: maximize the objective instead of minimizing it (default: False).
        sharded: ``True``: the group's parameters are split over the ranks of the default
            process group (``torch.distributed.optim.ZeroRedundancyOptimizer``, FSDP2
            ``fully_shard``): every dot product (and the largest gradient entry, and the
            finiteness test) is all-reduced across ranks before the step size moves, so all
            ranks learn the same step size. Needs ``granularity="group"``. Does nothing (no
            collective call) when ``torch.distributed`` is not initialized. Not needed under
            ``DistributedDataParallel``, whose gradients are already all-reduced. ``None``:
            detect: FSDP2's DTensor parameters reduce as with ``True``; otherwise the first
            step under ``torch.distributed`` compares what the ranks hold (one small
            all-reduce) and warns if they differ. ``False``: no reduction and no check
            (default: None).

    .. note::
        Step sizes are learned in log space (``a = lr * exp(u)``), so they stay positive
        without clamping, and ``lr`` is an outer factor: a learning-rate scheduler that
        rewrites ``group["lr"]`` rescales the learned step size instead of replacing it.
        :meth:`step_sizes` returns the values in use."""
