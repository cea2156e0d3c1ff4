"""One training run: corpus -> model -> loop -> TensorBoard, checkpoints, summary.json.

Hydra-free: takes the resolved config as a plain dict plus the run folder and a few names the
entry point read from Hydra (the config-group choices and the grid cell).
"""

from __future__ import annotations

import contextlib
import math
import signal
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from omegaconf import OmegaConf

from . import records
from .compute import account, steps_from_budget
from .optim import build_optimizer, lr_at, training_step


class Interrupted(Exception):
    """Raised inside the loop by Ctrl-C / SIGTERM after the checkpoint is written."""


@dataclass
class RunInfo:
    run_dir: Path
    choices: dict  # config-group choices, e.g. {"attention": "differential", "model": "tiny"}
    cell: str      # grid cell name (the run's overrides without the seed)
    overrides: list


def set_threads(runtime: dict, parallel_jobs: int | None) -> None:
    threads = runtime.get("threads")
    if threads is None and parallel_jobs:
        import os

        threads = max(1, (os.cpu_count() or 1) // parallel_jobs)
    if threads:
        torch.set_num_threads(int(threads))


def resolve_device(name: str) -> torch.device:
    if name.startswith("cuda") and not torch.cuda.is_available():
        from .schema import ConfigError

        raise ConfigError(f"runtime.device={name!r}: CUDA is not available on this machine; use runtime.device=cpu")
    return torch.device(name)


def reference_flops_per_token(cfg, vocab_size: int) -> float:
    """FLOPs per token of standard attention at this model size: what budget.tokens buys when
    the budget is matched in FLOPs and no FLOPs figure is given."""
    from .config import build_model

    ref = cfg.copy()
    ref.attention = OmegaConf.create({"_target_": "ablate.attention.StandardAttention", "head_dim": cfg.model.head_dim})
    with torch.device("meta"):
        return account(build_model(ref, vocab_size)).flops_per_token


def evaluate(model, windows: torch.Tensor, batch_size: int) -> float:
    model.eval()
    total, count = 0.0, 0
    with torch.no_grad():
        for i in range(0, len(windows), batch_size):
            batch = windows[i : i + batch_size]
            logits = model(batch[:, :-1])
            loss = torch.nn.functional.cross_entropy(
                logits.reshape(-1, logits.shape[-1]).float(), batch[:, 1:].reshape(-1), reduction="sum"
            )
            total += loss.item()
            count += batch[:, 1:].numel()
    model.train()
    return total / count


def lambda_values(model) -> dict[str, float]:
    out = {}
    for i, block in enumerate(model.attention_blocks()):
        if hasattr(block, "lambda_value"):
            out[f"lambda/layer_{i}"] = float(block.lambda_value().detach())
    return out


def hparams_of(choices: dict, resolved: dict) -> dict:
    """Design values for TensorBoard's hparams table: group choices plus scalar options."""
    values = {f"choice/{k}": str(v) for k, v in sorted(choices.items()) if v is not None}
    for key in ("d_model", "n_layers", "head_dim", "seq_len"):
        values[f"model/{key}"] = resolved["model"][key]
    for key, value in sorted(resolved["attention"].items()):
        if key != "_target_" and isinstance(value, (int, float, str, bool)):
            values[f"attention/{key}"] = value
    values["optim/lr"] = resolved["optim"]["lr"]
    values["seed"] = resolved["seed"]
    return values


class StopSignals:
    """SIGINT (Ctrl-C) and SIGTERM handling for one run.

    Outside the training loop either signal raises KeyboardInterrupt. Inside it
    (``with stops.deferred():``) a signal is only noted: the loop finishes the step it is in,
    writes a checkpoint and stops, so a checkpoint never holds a half-applied optimizer step
    and a second signal during that save changes nothing.
    """

    SIGNALS = ("SIGINT", "SIGTERM")

    def __init__(self):
        self.received: str | None = None
        self._deferring = False
        self._previous = {}

    def _handle(self, signum, frame):
        if self._deferring:
            self.received = self.received or signal.Signals(signum).name
            return
        raise KeyboardInterrupt

    def __enter__(self):
        for name in self.SIGNALS:
            sig = getattr(signal, name)
            if signal.getsignal(sig) == signal.SIG_IGN:
                continue  # ignored by whoever started us (nohup, a background job): keep it so
            try:
                self._previous[sig] = signal.signal(sig, self._handle)
            except ValueError:  # not the main thread (some launchers): signals stay as they were
                self.__exit__()
                break
        return self

    def __exit__(self, *exc):
        for sig, previous in self._previous.items():
            signal.signal(sig, previous)
        self._previous.clear()
        return False

    @contextlib.contextmanager
    def deferred(self):
        self._deferring = True
        try:
            yield
        finally:
            self._deferring = False


def data_windows(corpus, seq_len: int, batch_size: int, seed: int, eval_windows: int):
    """Training batches and validation windows. What the corpus cannot serve (a window longer
    than its documents allow, more validation windows than it has) is only known once the text
    is tokenized; it is a ConfigError naming the key, raised before anything trains."""
    import toy_corpus

    split, key, value = "training", "model.seq_len", seq_len
    try:
        batches = toy_corpus.WindowBatches(corpus.train_ids, seq_len, batch_size, seed)
        split = "validation"
        val = toy_corpus.validation_windows(corpus.val_ids, seq_len, eval_windows)
    except ValueError as exc:
        from .schema import ConfigError

        message = str(exc).splitlines()[0]
        if message.startswith("ids:"):
            raise ConfigError(f"{key}={value}: longer than the {split} text allows ({message.removeprefix('ids: ')}); "
                              "allowed: a shorter model.seq_len, or more data (data.n_documents)") from None
        if message.startswith("n_windows="):
            raise ConfigError(f"budget.eval_windows={eval_windows}: {message.split(': ', 1)[1]}; "
                              "allowed: fewer windows, or more data (data.n_documents)") from None
        raise ConfigError(message) from None
    return batches, val


def check_fits(model, saved: dict, path: Path) -> None:
    """Refuse saved weights whose names or shapes differ from the model's (the same config can
    build another model after the code changed)."""
    own = model.state_dict()
    missing = [k for k in own if k not in saved]
    unexpected = [k for k in saved if k not in own]
    reshaped = [k for k in own if k in saved and tuple(saved[k].shape) != tuple(own[k].shape)]
    if missing or unexpected or reshaped:
        example = (missing or unexpected or reshaped)[0]
        raise records.CheckpointError(
            f"checkpoint {path} does not fit this model ({len(missing)} tensors missing, {len(unexpected)} unexpected, "
            f"{len(reshaped)} of another shape, e.g. {example}); delete it to start the run afresh"
        )


def run(cfg, info: RunInfo, parallel_jobs: int | None = None) -> dict:
    """Train one run to its budget (resuming if a checkpoint exists). Returns the summary.

    Raises :class:`Interrupted` after writing a checkpoint when SIGINT or SIGTERM arrives during
    training, and ``records.CheckpointError`` (before touching the run folder) when the folder's
    checkpoint is damaged or belongs to another config.
    """
    with StopSignals() as stops:
        return _run(cfg, info, parallel_jobs, stops)


def _run(cfg, info: RunInfo, parallel_jobs: int | None, stops: StopSignals) -> dict:
    import toy_corpus
    from torch.utils.tensorboard import SummaryWriter
    from torch.utils.tensorboard.summary import hparams

    from .config import build_model

    started = time.time()
    resolved = OmegaConf.to_container(cfg, resolve=True)
    device = resolve_device(resolved["runtime"]["device"])
    run_dir = info.run_dir
    run_dir.mkdir(parents=True, exist_ok=True)
    fingerprint = records.config_fingerprint(resolved)
    ckpt_path = run_dir / records.CHECKPOINT
    records.remove_stale_temp_files(run_dir)
    # Read (and refuse) an existing checkpoint before anything in the folder is rewritten.
    state = records.load_checkpoint(ckpt_path, fingerprint) if ckpt_path.exists() else None

    set_threads(resolved["runtime"], parallel_jobs)
    seq_len, batch_size = cfg.model.seq_len, cfg.budget.batch_size

    corpus = toy_corpus.get_corpus(resolved["data"], seq_len, resolved["runtime"]["cache_dir"])
    batches, val_windows = data_windows(corpus, seq_len, batch_size, cfg.seed, cfg.budget.eval_windows)
    records.atomic_write_bytes(run_dir / "config.yaml", OmegaConf.to_yaml(cfg, resolve=True).encode())
    torch.manual_seed(cfg.seed)
    model = build_model(cfg, corpus.vocab_size)
    acc = account(model)
    flops_budget = cfg.budget.flops
    if cfg.budget.match == "flops" and flops_budget is None:
        flops_budget = cfg.budget.tokens * reference_flops_per_token(cfg, corpus.vocab_size)
    tokens_per_step = batch_size * seq_len
    total_steps = steps_from_budget(cfg.budget.match, tokens_per_step, acc.flops_per_token, cfg.budget.tokens, flops_budget)
    model.to(device)
    optimizer = build_optimizer(model, cfg.optim.lr, cfg.optim.betas, cfg.optim.weight_decay, cfg.optim.eps)
    warmup = int(cfg.optim.warmup_fraction * total_steps)

    step = 0
    last_val = None
    last_finite = None
    if state is not None:
        check_fits(model, state["model"], ckpt_path)
        try:
            model.load_state_dict(state["model"])
            optimizer.load_state_dict(state["optimizer"])
        except (KeyError, ValueError, RuntimeError) as exc:
            raise records.CheckpointError(
                f"checkpoint {ckpt_path} does not fit this model or optimizer ({type(exc).__name__}: "
                f"{str(exc).splitlines()[0][:160]}); delete it to start the run afresh"
            ) from None
        step, last_val, last_finite = int(state["step"]), state.get("last_val"), state.get("last_train")
        print(f"resuming {run_dir.name} from step {step} ({step * tokens_per_step:,} tokens)", flush=True)
        del state

    train_model = torch.compile(model) if cfg.runtime.compile else model
    val = torch.from_numpy(val_windows).to(device)
    # Everything up to the checkpoint's step was flushed before the checkpoint was written, so
    # on resume TensorBoard is told to drop only what an earlier attempt logged after it
    # (purge_step: events at or after it are hidden), and the curve has no duplicated steps.
    # The writer is closed (flushed) on every way out: the event files of a diverged, failed or
    # interrupted run are kept whole.
    with SummaryWriter(log_dir=str(run_dir), purge_step=step * tokens_per_step + 1 if step else None) as writer:
        if step == 0:
            exp, ssi, sei = hparams(hparams_of(info.choices, resolved), {"final/val_loss": 0.0, "final/train_loss": 0.0})
            for s in (exp, ssi, sei):
                writer.file_writer.add_summary(s)
            writer.add_text("config", "```\n" + OmegaConf.to_yaml(cfg, resolve=True) + "\n```", 0)

        eval_every = max(1, round(cfg.budget.eval_every_tokens / tokens_per_step))
        ckpt_every = max(1, round(cfg.budget.checkpoint_every_tokens / tokens_per_step))
        log_every = cfg.budget.log_every_steps
        probes_cfg = resolved.get("probes") or {}
        probe_every_tokens = probes_cfg.get("every_tokens") if probes_cfg.get("enabled") else None
        probe_every = max(1, round(probe_every_tokens / tokens_per_step)) if probe_every_tokens else None
        stop_after = cfg.runtime.stop_after_steps
        summary = {
            "status": "running",
            "attention": info.choices.get("attention"),
            "choices": info.choices,
            "cell": info.cell,
            "overrides": info.overrides,
            "seed": cfg.seed,
            "params": acc.params,
            "non_embedding_params": acc.non_embedding_params,
            "flops_per_token": acc.flops_per_token,
            "budget_match": cfg.budget.match,
            "total_steps": total_steps,
            "tokens_per_step": tokens_per_step,
            "fingerprint": fingerprint,
            "environment": records.environment(str(device)),
            "probes": {},
        }

        def save(at_step: int):
            writer.flush()  # events up to at_step reach the disk before the checkpoint that vouches for them
            records.save_checkpoint(ckpt_path, {
                "fingerprint": fingerprint, "step": at_step, "last_val": last_val, "last_train": last_finite,
                "model": model.state_dict(), "optimizer": optimizer.state_dict(),
            })

        from tqdm import tqdm

        bar = tqdm(
            total=total_steps * tokens_per_step, initial=step * tokens_per_step, unit="tok", unit_scale=True,
            desc=info.cell or run_dir.name, disable=not cfg.runtime.progress, dynamic_ncols=True, leave=False,
        )
        t_window, tokens_window = time.perf_counter(), 0
        status = "completed"
        try:
            with stops.deferred():
                while step < total_steps:
                    batch = torch.from_numpy(batches.get(step)).to(device)
                    lr = lr_at(step, total_steps, cfg.optim.lr, warmup, cfg.optim.min_lr_ratio)
                    loss, grad_norm = training_step(train_model, optimizer, batch, lr, cfg.optim.grad_clip)
                    step += 1
                    tokens = step * tokens_per_step
                    loss_value, grad_value = loss.item(), grad_norm.item()
                    if not (math.isfinite(loss_value) and math.isfinite(grad_value)):
                        # training_step skipped the optimizer step on a non-finite gradient; nothing
                        # of this step is saved: the last checkpoint stays the last finite state.
                        status = "diverged"
                        summary.update(
                            diverged_at_step=step, diverged_at_tokens=tokens, last_finite_loss=last_finite,
                            diverged_on="loss" if not math.isfinite(loss_value) else "gradient",
                            diverged_loss=loss_value if math.isfinite(loss_value) else str(loss_value),
                            diverged_grad_norm=grad_value if math.isfinite(grad_value) else str(grad_value),
                        )
                        writer.add_scalar("loss/train", loss_value, tokens)
                        writer.add_scalar("optim/grad_norm", grad_value, tokens)
                        break
                    last_finite = loss_value
                    tokens_window += tokens_per_step
                    bar.update(tokens_per_step)
                    if step % log_every == 0 or step == total_steps:
                        elapsed = time.perf_counter() - t_window
                        speed = tokens_window / elapsed if elapsed > 0 else float("nan")
                        writer.add_scalar("loss/train", loss_value, tokens)
                        writer.add_scalar("optim/lr", lr, tokens)
                        writer.add_scalar("optim/grad_norm", grad_value, tokens)
                        writer.add_scalar("speed/tokens_per_second", speed, tokens)
                        writer.add_scalar("compute/train_flops", tokens * acc.flops_per_token, tokens)
                        for tag, value in lambda_values(model).items():
                            writer.add_scalar(tag, value, tokens)
                        bar.set_postfix(loss=f"{loss_value:.3f}")
                        t_window, tokens_window = time.perf_counter(), 0
                    if step % eval_every == 0 or step == total_steps:
                        last_val = evaluate(model, val, batch_size)
                        writer.add_scalar("loss/val", last_val, tokens)
                    if probe_every and step % probe_every == 0 and step < total_steps:
                        # numbers only during training; pictures are drawn once, at the end
                        run_probes(model, corpus, {**probes_cfg, "images": False}, device, writer, run_dir, tokens)
                    saved = step % ckpt_every == 0 or step == total_steps
                    if saved:
                        save(step)
                    if stops.received is not None:
                        if not saved:
                            save(step)
                        raise Interrupted(
                            f"stopped by {stops.received} at step {step} of {total_steps} ({step * tokens_per_step:,} tokens); "
                            f"checkpoint saved in {run_dir}. Run the same command again to resume."
                        )
                    if stop_after is not None and step >= stop_after and step < total_steps:
                        if not saved:
                            save(step)
                        status = "stopped"
                        break
        finally:
            bar.close()

        tokens = step * tokens_per_step
        summary.update(
            status=status,
            step=step,
            tokens=tokens,
            train_flops=tokens * acc.flops_per_token,
            final_train_loss=last_finite,
            final_val_loss=last_val,
        )
        if status == "completed":
            summary["probes"] = run_probes(model, corpus, resolved.get("probes"), device, writer, run_dir, tokens)
            writer.add_scalar("final/val_loss", last_val, tokens)
            writer.add_scalar("final/train_loss", last_finite, tokens)
        writer.flush()
        summary["wall_seconds"] = time.time() - started
        if status != "stopped":
            records.write_json(run_dir / records.SUMMARY, summary)
        return summary


def run_probes(model, corpus, probes_cfg, device, writer, run_dir: Path, tokens: int) -> dict:
    if not probes_cfg or not probes_cfg.get("enabled"):
        return {}
    from .probes import run_probes as probe_all

    numbers, images = probe_all(model, corpus, probes_cfg, device=str(device))
    for name, value in numbers.items():
        writer.add_scalar(f"probe/{name}", value, tokens)
    if images:
        from PIL import Image

        folder = run_dir / "probes"
        folder.mkdir(exist_ok=True)
        for name, image in images.items():
            writer.add_image(f"probe/{name}", image, tokens, dataformats="HWC")
            Image.fromarray(np.asarray(image)).save(folder / (name.replace("/", "_") + ".png"))
    return {k: float(v) for k, v in numbers.items()}
