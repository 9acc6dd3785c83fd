"""Glue for training frameworks; each module imports its framework only when imported itself.

- :mod:`stepsize_tower.integrations.hf`: :class:`~stepsize_tower.integrations.hf.EffectiveLRScheduler`,
  a scheduler wrapper whose ``get_last_lr()`` reports the step size in use (what the Hugging
  Face ``Trainer`` logs as ``learning_rate``). Needs no framework at all.
- :mod:`stepsize_tower.integrations.lightning`: ``StepSizeMonitor``, a PyTorch Lightning
  callback that logs every level's step size (``pip install "stepsize_tower[lightning]"``).
"""
