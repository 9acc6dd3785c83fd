"""A tower in the Hugging Face Trainer (optimizers=(opt, sched)), with a tiny model defined here.

python experiments/examples/with_hf_trainer.py --steps 100
"""

from __future__ import annotations

import argparse
import sys
import tempfile

import _data
import torch
from torch import nn

import stepsize_tower
from stepsize_tower.integrations.hf import EffectiveLRScheduler


class LossModel(nn.Module):
    """Returns {"loss": ...} as Hugging Face models do; nothing is downloaded."""

    def __init__(self) -> None:
        super().__init__()
        self.net = _data.model()

    def forward(self, inputs: torch.Tensor, labels: torch.Tensor) -> dict[str, torch.Tensor]:
        return {"loss": nn.functional.mse_loss(self.net(inputs), labels)}


class Rows(torch.utils.data.Dataset):
    def __init__(self) -> None:
        xs, ys = zip(*(_data.batch(i, size=8) for i in range(64)), strict=True)
        self.x, self.y = torch.cat(xs), torch.cat(ys)

    def __len__(self) -> int:
        return len(self.x)

    def __getitem__(self, i: int) -> dict[str, torch.Tensor]:
        return {"inputs": self.x[i], "labels": self.y[i]}


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=100)
    steps = parser.parse_args().steps
    try:
        import transformers
    except ImportError:
        print("transformers is not installed (pip install 'stepsize_tower[hf]'): skipping.")
        sys.exit(0)
    model = LossModel()
    optimizer = stepsize_tower.TowerAdamW(model.parameters(), lr=1e-3)
    schedule = transformers.get_linear_schedule_with_warmup(optimizer, steps // 10, steps)
    with tempfile.TemporaryDirectory() as out:
        args = transformers.TrainingArguments(
            output_dir=out,
            max_steps=steps,
            per_device_train_batch_size=32,
            logging_steps=max(1, steps // 5),
            report_to=[],
            save_strategy="no",
            use_cpu=True,
            disable_tqdm=True,
        )
        trainer = transformers.Trainer(
            model=model, args=args, train_dataset=Rows(), optimizers=(optimizer, EffectiveLRScheduler(schedule))
        )
        trainer.train()
    for entry in trainer.state.log_history:
        if "learning_rate" in entry:
            print(
                f"step {entry['step']:4d} loss {entry['loss']:.4f} learning_rate (step size used) "
                f"{entry['learning_rate']:.2e}"
            )


if __name__ == "__main__":
    main()
