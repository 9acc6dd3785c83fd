"""Field benchmark: does a typed ``lr`` end as well as a tuned rate on realistic training scripts?

Four CPU tasks written as practitioners write them (their model, loop, clipping, schedule),
with only the optimizer line swapped: ``word_lstm`` (word-level LSTM language model,
10 002-token vocabulary, dropout, gradient-norm clipping 0.25, 1 000 steps),
``char_transformer`` (causal byte-level transformer, AdamW, weight decay 0.1, clipping 1.0,
1 000 steps), ``resnet_digits`` (residual conv net with batch norm, 400 steps) and ``lsq_raw``
(least squares on features scaled 1e-2 … 1e3, 1 000 steps). Data ships with Python or
scikit-learn; nothing downloads.

Methods (same seeds, same batches): fixed-rate ``torch.optim`` grids, the 5 % warm-up +
cosine grid, the tower with only ``lr`` typed over six decades, and the tower under the
warm-up + cosine shape. Each run records its initial loss, final training loss (mean of the
last 5 % of steps, and the last batch), held-out loss, divergence, wall time and, for towers,
the step-size trajectory (every 10 steps) and its final value.

A run is GOOD when ``L ≤ L_best + 0.05 · (L_init − L_best)``, with ``L_best`` the best tuned
baseline (fixed or warm-up + cosine) of the same base, task and seed, on training loss.

Usage (one process, one thread; resumable: finished runs in ``points.jsonl`` are skipped)::

    PYTHONPATH=. python -m experiments.field                     # everything, seeds 0 1
    PYTHONPATH=. python -m experiments.field --quick             # smoke test, tiny budgets
    PYTHONPATH=. python -m experiments.field --tasks word_lstm --methods fixed tower --seeds 0
    PYTHONPATH=. python -m experiments.field --report-only       # report the points so far

Output under ``--out`` (default ``experiments/out/field/``): ``points.jsonl``, ``results.md``,
``field.png``.
"""
