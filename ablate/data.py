"""What the trainer reads: one data source per data family, behind one small interface.

A source gives the batch for a step (a pure function of the seed and the step, so resuming is
exact), an optional loss mask over target positions, the held-out evaluation, and the probes that
fit its data. Two families:

- :class:`LogbookSource`: windows of the tokenized logbook corpus (``data=toy``); the loss is on
  every target, evaluation is the mean validation loss, the probes use the corpus' probe sets;
- :class:`DrillSource`: symbolic recall drills (``data=recall`` and kin); the loss is on the
  answers (or every token with ``data.loss_on=all``), evaluation adds held-out accuracy, and the
  end of the run adds the accuracy curve's area and tokens-to-threshold.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import torch

import toy_corpus
from toy_corpus.drills import Drill, accuracy

from . import curves
from .checks import one_line
from .probes import run_probes
from .probes.common import evaluating
from .probes.drill import DRILL_PROBES, drill_probes
from .probes.suite import LOGBOOK_PROBES
from .schema import ConfigError


def masked_loss_sum(
    logits: torch.Tensor, targets: torch.Tensor, mask: torch.Tensor | None
) -> tuple[float, int]:
    """Summed cross-entropy over the masked targets (all targets when ``mask`` is None) and their count."""
    losses = torch.nn.functional.cross_entropy(
        logits.reshape(-1, logits.shape[-1]).float(), targets.reshape(-1), reduction="none"
    )
    if mask is None:
        return float(losses.sum()), losses.numel()
    keep = mask.reshape(-1)
    return float(losses[keep].sum()), int(keep.sum())


def evaluate_loss(
    model, tokens: torch.Tensor, mask: torch.Tensor | None, batch_size: int
) -> tuple[float, np.ndarray]:
    """Mean held-out loss over the (masked) targets and the argmax predictions, in eval mode (the
    previous mode is restored on every way out)."""
    total, count, predictions = 0.0, 0, []
    with evaluating(model):
        for i in range(0, len(tokens), batch_size):
            batch = tokens[i : i + batch_size]
            logits = model(batch[:, :-1])
            part = None if mask is None else mask[i : i + batch_size]
            s, n = masked_loss_sum(logits, batch[:, 1:], part)
            total, count = total + s, count + n
            predictions.append(logits.argmax(-1).cpu().numpy())
    return total / max(count, 1), np.concatenate(predictions)


@dataclass
class LogbookSource:
    """Windows of the logbook corpus (:mod:`toy_corpus`)."""

    corpus: object
    batches: object
    val: torch.Tensor
    batch_size: int
    kind: str = "logbook"

    @property
    def vocab_size(self) -> int:
        return self.corpus.vocab_size

    def batch(self, step: int, device) -> tuple[torch.Tensor, None]:
        return torch.from_numpy(self.batches.get(step)).to(device), None

    def evaluate(self, model) -> dict[str, float]:
        loss, _ = evaluate_loss(model, self.val, None, self.batch_size)
        return {"loss/val": loss}

    def probe(self, model, probes_cfg: dict, device) -> tuple[dict, dict]:
        return run_probes(model, self.corpus, probes_cfg, device=str(device))

    @property
    def seq_len(self) -> int:
        return self.batches.seq_len

    def final_metrics(self, history: dict, budget_tokens: float) -> dict[str, float]:
        return {}


@dataclass
class DrillSource:
    """A recall drill (:mod:`toy_corpus.drills`): sequences and loss masks drawn per step."""

    drill: object
    batch_size: int
    val: torch.Tensor
    val_mask: torch.Tensor
    kind: str = "drill"

    @property
    def vocab_size(self) -> int:
        return self.drill.vocab_size

    def batch(self, step: int, device) -> tuple[torch.Tensor, torch.Tensor]:
        tokens, mask = self.drill.batch(step, self.batch_size)
        return torch.from_numpy(tokens).to(device), torch.from_numpy(mask).to(device)

    def evaluate(self, model) -> dict[str, float]:
        loss, predictions = evaluate_loss(model, self.val, self.val_mask, self.batch_size)
        acc = accuracy(predictions, self.val.cpu().numpy(), self.val_mask.cpu().numpy())
        return {"loss/val": loss, "drill/acc": acc, "drill/copy_level": float(self.drill.copy_level)}

    def probe(self, model, probes_cfg: dict, device) -> tuple[dict, dict]:

        return drill_probes(model, self.drill, probes_cfg, device=str(device)), {}

    @property
    def seq_len(self) -> int:
        return self.drill.length - 1

    def final_metrics(self, history: dict, budget_tokens: float) -> dict[str, float]:
        """Area under the held-out accuracy curve and tokens to the halfway and 0.9 levels; a level
        not reached within the budget is censored: ``*_reached`` is 0 and no tokens figure is given."""

        points = history.get("drill/acc", [])
        tokens = np.array([t for t, _ in points], dtype=float)
        acc = np.array([a for _, a in points], dtype=float)
        level = float(self.drill.copy_level)
        out = {
            "drill/auc": curves.normalised_area(tokens, acc, budget_tokens, level),
            "drill/acc": float(acc[-1]),  # held-out accuracy at the last evaluation (the budget)
            "drill/copy_level": level,
        }
        for name, threshold in (("half", curves.halfway(level)), ("90", 0.9)):
            reached = curves.tokens_to(tokens, acc, threshold)
            out[f"drill/{name}_reached"] = float(reached is not None)
            if reached is not None:
                out[f"drill/tokens_to_{name}"] = float(reached)
        return out


def open_source(
    resolved: dict, seq_len: int, batch_size: int, seed: int, device
) -> LogbookSource | DrillSource:
    """The data source of a resolved config (its family: :func:`family_of`)."""
    return family_of(resolved["data"]).open(resolved, seq_len, batch_size, seed, device)


def _logbook(resolved: dict, seq_len: int, batch_size: int, seed: int, device) -> LogbookSource:
    corpus = toy_corpus.get_corpus(resolved["data"], seq_len, resolved["runtime"]["cache_dir"])
    eval_windows = resolved["budget"]["eval_windows"]
    split = "training"
    try:
        batches = toy_corpus.WindowBatches(corpus.train_ids, seq_len, batch_size, seed)
        split = "validation"
        val = toy_corpus.validation_windows(corpus.val_ids, seq_len, eval_windows)
    except ValueError as exc:
        raise ConfigError(_window_message(one_line(exc, 1000), split, seq_len, eval_windows)) from None
    return LogbookSource(corpus, batches, torch.from_numpy(val).to(device), batch_size)


def _window_message(message: str, split: str, seq_len: int, eval_windows: int) -> str:
    """What the corpus cannot serve is only known once the text is tokenized: name the key."""
    if message.startswith("ids:"):
        return (
            f"model.seq_len={seq_len}: longer than the {split} text allows "
            f"({message.removeprefix('ids: ')}); "
            "allowed: a shorter model.seq_len, or more data (data.n_documents)"
        )
    if message.startswith("n_windows="):
        return (
            f"budget.eval_windows={eval_windows}: {message.split(': ', 1)[1]}; "
            "allowed: fewer windows, or more data (data.n_documents)"
        )
    return message


def _drill(resolved: dict, seq_len: int, batch_size: int, seed: int, device) -> DrillSource:
    drill = Drill.from_dict(resolved["data"])
    _check_drill_fits(drill, seq_len)
    tokens, mask = drill.held_out(int(resolved["budget"]["eval_windows"]))
    return DrillSource(
        drill, batch_size, torch.from_numpy(tokens).to(device), torch.from_numpy(mask).to(device)
    )


def _check_drill_fits(drill: Drill, seq_len: int) -> None:
    if drill.length - 1 > seq_len:
        raise ConfigError(
            f"model.seq_len={seq_len}: shorter than the {drill.cfg.kind} drill's sequences "
            f"({drill.length - 1} inputs); allowed: model.seq_len >= {drill.length - 1}, or a shorter drill"
        )


def _check_drill(data: dict, seq_len: int) -> None:
    _check_drill_fits(Drill.from_dict(data), seq_len)  # from_dict runs DrillConfig.check


def _drill_shape(data: dict, seq_len: int) -> tuple[int, int]:
    drill = Drill.from_dict(data)
    return int(drill.vocab_size), int(drill.length - 1)


@dataclass(frozen=True)
class DataFamily:
    """One family of training data: how its config group is checked (a ``ValueError`` or
    ``ConfigError`` naming the key), what shape it gives the model without building it
    (vocabulary size, tokens per sequence), how its source opens, and which probes run on it."""

    name: str
    check: Callable[[dict, int], None]
    shape: Callable[[dict, int], tuple[int, int]]
    open: Callable[..., object]
    probes: tuple[str, ...]


FAMILIES = {
    "logbook": DataFamily(
        "logbook",
        toy_corpus.check_config,
        lambda data, seq_len: (int(data["vocab_size"]), int(seq_len)),
        _logbook,
        LOGBOOK_PROBES,
    ),
    "drill": DataFamily("drill", _check_drill, _drill_shape, _drill, DRILL_PROBES),
}


def family_of(data: dict) -> DataFamily:
    """The family of a data group: ``logbook`` (no ``kind``, or ``kind: logbook``), else a drill."""
    return FAMILIES["logbook" if data.get("kind", "logbook") == "logbook" else "drill"]
