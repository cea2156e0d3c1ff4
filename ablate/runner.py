"""One training run as named stages around one :class:`RunState`.

    prepare  -> config, data source, model, budget, optimizer, checkpoint read (refused if damaged)
    resume   -> weights, optimizer and curves from the checkpoint, when there is one
    one_step -> one optimizer step on the step's batch
    periodic -> what happens every so many steps: logs, evaluation, probes, checkpoint, signals
    finish   -> final probes, summary.json

Hydra-free: takes the resolved config plus the run folder and a few names the entry point read
from Hydra (the config-group choices and the grid cell).
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
from omegaconf import OmegaConf
from tqdm import tqdm

from . import records
from .attention.common import use_kernels
from .cells import level_text
from .checks import one_line
from .compute import account, steps_from_budget
from .config import build_model
from .data import open_source
from .optim import build_optimizer, lr_at, training_step
from .runlog import RunLog
from .schema import ConfigError
from .signals import StopSignals

__all__ = [
    "run",
    "RunInfo",
    "Interrupted",
    "RunState",
    "check_fits",
    "factor_levels",
    "hparams_of",
    "progress_label",
]


class Interrupted(Exception):
    """Raised inside the loop by Ctrl-C / SIGTERM after the checkpoint is written."""


@dataclass
class RunInfo:
    run_dir: Path
    choices: dict  # config-group choices, e.g. {"attention": "differential", "model": "tiny"}
    cell: str  # grid cell name (the run's overrides without the seed)
    overrides: list
    slot: int | None = None  # under a parallel launcher: which of its n_jobs lines the progress bar uses


@dataclass
class Schedule:
    """Every how many steps each periodic hook runs (``probe_every`` None: only at the end)."""

    log_every: int
    eval_every: int
    ckpt_every: int
    probe_every: int | None
    stop_after: int | None

    @classmethod
    def of(cls, resolved: dict, tokens_per_step: int) -> "Schedule":
        budget, probes = resolved["budget"], resolved.get("probes") or {}
        probe_tokens = probes.get("every_tokens") if probes.get("enabled") else None
        return cls(
            log_every=budget["log_every_steps"],
            eval_every=max(1, round(budget["eval_every_tokens"] / tokens_per_step)),
            ckpt_every=max(1, round(budget["checkpoint_every_tokens"] / tokens_per_step)),
            probe_every=max(1, round(probe_tokens / tokens_per_step)) if probe_tokens else None,
            stop_after=resolved["runtime"]["stop_after_steps"],
        )


@dataclass
class RunState:
    """Everything one run carries from stage to stage."""

    cfg: object
    resolved: dict
    info: RunInfo
    device: torch.device
    source: object
    model: torch.nn.Module
    train_model: torch.nn.Module
    optimizer: torch.optim.Optimizer
    total_steps: int
    tokens_per_step: int
    warmup: int
    flops_per_token: float
    schedule: Schedule
    summary: records.RunSummary
    started: float
    step: int = 0
    last_val: float | None = None
    last_finite: float | None = None
    history: dict = field(default_factory=dict)  # metric -> [(tokens, value)], kept across resumes
    writer: object = None
    log: RunLog | None = None  # train.log: the run's story, one timestamped line per event

    @property
    def run_dir(self) -> Path:
        return self.info.run_dir

    @property
    def tokens(self) -> int:
        return self.step * self.tokens_per_step


def set_threads(runtime: dict, parallel_jobs: int | None) -> None:
    threads = runtime.get("threads")
    if threads is None and parallel_jobs:
        threads = max(1, (os.cpu_count() or 1) // parallel_jobs)
    if threads:
        torch.set_num_threads(int(threads))


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
    return {**values, **factor_levels(choices, resolved)}


def factor_levels(choices: dict, resolved: dict) -> dict[str, str]:
    """``factor/<key>`` -> this run's level of each factor the recipe declares (``grid.factors``):
    the group choice for a config group, else the value at that path; ``-`` where the factor does
    not exist (a nested factor outside its level), so TensorBoard's HPARAMS view filters by factor."""
    out = {}
    for key in (resolved.get("grid") or {}).get("factors") or {}:
        if key in choices:
            value = choices[key]
        else:
            value = resolved
            for part in key.split("."):
                value = value.get(part) if isinstance(value, dict) else None
        out[f"factor/{key}"] = "-" if value is None else level_text(value)
    return out


def block_scalars(model) -> dict[str, float]:
    """What each attention block chooses to report (its optional ``log_scalars()``), per layer."""
    out = {}
    for i, block in enumerate(model.attention_blocks()):
        report = getattr(block, "log_scalars", None)
        for name, value in (report() if report else {}).items():
            out[f"{name}/layer_{i}"] = float(value)
    return out


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
            f"checkpoint {path} does not fit this model ({len(missing)} tensors missing, "
            f"{len(unexpected)} unexpected, "
            f"{len(reshaped)} of another shape, e.g. {example}); delete it to start the run afresh"
        )


# --- prepare ---------------------------------------------------------------------------------


def plan_steps(resolved: dict, flops_per_token: float, tokens_per_step: int) -> int:
    """Steps the budget buys (``budget.match=flops`` needs ``budget.flops``, which the entry point
    prices in the pre-flight when the config leaves it null)."""
    budget = resolved["budget"]
    if budget["match"] == "flops" and budget["flops"] is None:
        raise ConfigError("budget.flops: null with budget.match=flops; h2h-train prices it before a run")
    return steps_from_budget(
        budget["match"], tokens_per_step, flops_per_token, budget["tokens"], budget["flops"]
    )


def prepare(cfg, info: RunInfo, parallel_jobs: int | None) -> tuple[RunState, dict | None]:
    """Everything before the first step. Reads (and refuses) an existing checkpoint before anything
    in the folder is rewritten; returns the state and the checkpoint to resume from, if any."""

    resolved = OmegaConf.to_container(cfg, resolve=True)
    device = torch.device(resolved["runtime"]["device"])  # available: checked in the pre-flight
    info.run_dir.mkdir(parents=True, exist_ok=True)
    fingerprint = records.config_fingerprint(resolved)
    ckpt_path = info.run_dir / records.CHECKPOINT
    records.remove_stale_temp_files(info.run_dir)
    saved = records.load_checkpoint(ckpt_path, fingerprint) if ckpt_path.exists() else None

    set_threads(resolved["runtime"], parallel_jobs)
    batch_size = resolved["budget"]["batch_size"]
    source = open_source(resolved, resolved["model"]["seq_len"], batch_size, resolved["seed"], device)
    records.atomic_write_bytes(info.run_dir / records.CONFIG, OmegaConf.to_yaml(cfg, resolve=True).encode())
    torch.manual_seed(resolved["seed"])  # anything not drawn from a keyed generator
    model = build_model(cfg, source.vocab_size)
    acc = account(model, source.seq_len)
    tokens_per_step = batch_size * source.seq_len
    total_steps = plan_steps(resolved, acc.flops_per_token, tokens_per_step)
    model.to(device)
    o = resolved["optim"]
    optimizer = build_optimizer(model, o["lr"], o["betas"], o["weight_decay"], o["eps"])
    compiled = bool(resolved["runtime"]["compile"])
    summary = _first_summary(resolved, info, acc, total_steps, tokens_per_step, fingerprint, device, source)
    summary.compiled = compiled
    state = RunState(
        cfg=cfg,
        resolved=resolved,
        info=info,
        device=device,
        source=source,
        model=model,
        train_model=torch.compile(model) if compiled else model,
        optimizer=optimizer,
        total_steps=total_steps,
        tokens_per_step=tokens_per_step,
        warmup=int(o["warmup_fraction"] * total_steps),
        flops_per_token=acc.flops_per_token,
        schedule=Schedule.of(resolved, tokens_per_step),
        summary=summary,
        started=time.time(),
        log=RunLog(info.run_dir),
    )
    log_start(state, acc.params)
    return state, saved


def log_start(state: RunState, params: int) -> None:
    """The first line of a run's story: what it is, what it costs, where it runs."""
    state.log.line(
        "start",
        cell=state.info.cell,
        seed=state.resolved["seed"],
        data=state.source.kind,
        params=params,
        flops_per_token=state.flops_per_token,
        steps=state.total_steps,
        tokens_per_step=state.tokens_per_step,
        budget_match=state.resolved["budget"]["match"],
        threads=torch.get_num_threads(),
        device=str(state.device),
        compile="on" if state.summary.compiled else "off",
    )


def _first_summary(
    resolved, info, acc, total_steps, tokens_per_step, fingerprint, device, source
) -> records.RunSummary:
    return records.RunSummary(
        status="running",
        attention=info.choices.get("attention"),
        seed=resolved["seed"],
        cell=info.cell,
        choices=info.choices,
        overrides=info.overrides,
        data_kind=source.kind,
        params=acc.params,
        non_embedding_params=acc.non_embedding_params,
        flops_per_token=acc.flops_per_token,
        budget_match=resolved["budget"]["match"],
        total_steps=total_steps,
        tokens_per_step=tokens_per_step,
        fingerprint=fingerprint,
        environment=records.environment(str(device)),
    )


# --- resume ----------------------------------------------------------------------------------


def resume(state: RunState, saved: dict) -> None:
    """Weights, optimizer, step and curves from a checkpoint written by this config."""
    path = state.run_dir / records.CHECKPOINT
    check_fits(state.model, saved["model"], path)
    try:
        state.model.load_state_dict(saved["model"])
        state.optimizer.load_state_dict(saved["optimizer"])
    except (KeyError, ValueError, RuntimeError) as exc:
        raise records.CheckpointError(
            f"checkpoint {path} does not fit this model or optimizer ({type(exc).__name__}: "
            f"{one_line(exc)}); delete it to start the run afresh"
        ) from None
    state.step, state.last_val, state.last_finite = (
        int(saved["step"]),
        saved.get("last_val"),
        saved.get("last_finite_train", saved.get("last_train")),  # the older key name too
    )
    state.history = saved.get("history") or {}
    state.log.line("resume", step=state.step, tokens=state.tokens)
    print(f"resuming {state.run_dir.name} from step {state.step} ({state.tokens:,} tokens)", flush=True)


def save(state: RunState) -> None:
    """A checkpoint at the current step; the events it vouches for reach the disk first."""
    state.writer.flush()
    records.save_checkpoint(
        state.run_dir / records.CHECKPOINT,
        {
            "fingerprint": state.summary.fingerprint,
            "step": state.step,
            "last_val": state.last_val,
            "last_finite_train": state.last_finite,
            "history": state.history,
            "model": state.model.state_dict(),
            "optimizer": state.optimizer.state_dict(),
        },
    )
    state.log.line("checkpoint", step=state.step, tokens=state.tokens)


# --- one step --------------------------------------------------------------------------------


def one_step(state: RunState) -> tuple[float, float, float]:
    """One optimizer step on the step's batch. Returns (loss, grad_norm, lr); advances the step."""
    o = state.resolved["optim"]
    tokens, mask = state.source.batch(state.step, state.device)
    lr = lr_at(state.step, state.total_steps, o["lr"], state.warmup, o["min_lr_ratio"])
    loss, grad_norm = training_step(state.train_model, state.optimizer, tokens, lr, o["grad_clip"], mask)
    state.step += 1
    return loss.item(), grad_norm.item(), lr


def note_divergence(state: RunState, loss: float, grad: float) -> None:
    """training_step skipped the optimizer step on a non-finite gradient; nothing of this step is
    saved: the last checkpoint stays the last finite state."""
    s = state.summary
    s.diverged_at_step, s.diverged_at_tokens, s.last_finite_loss = state.step, state.tokens, state.last_finite
    s.diverged_on = "loss" if not math.isfinite(loss) else "gradient"
    s.diverged_loss = loss if math.isfinite(loss) else str(loss)
    s.diverged_grad_norm = grad if math.isfinite(grad) else str(grad)
    state.writer.add_scalar("loss/train", loss, state.tokens)
    state.writer.add_scalar("optim/grad_norm", grad, state.tokens)
    state.log.line(
        "diverged",
        step=state.step,
        tokens=state.tokens,
        on=s.diverged_on,
        loss=loss,
        grad_norm=grad,
        last_finite_loss=state.last_finite,
    )


# --- periodic hooks --------------------------------------------------------------------------


def log_step(state: RunState, loss: float, grad: float, lr: float, speed: float) -> None:
    w, t = state.writer, state.tokens
    for tag, value in (
        ("loss/train", loss),
        ("optim/lr", lr),
        ("optim/grad_norm", grad),
        ("speed/tokens_per_second", speed),
        ("compute/train_flops", t * state.flops_per_token),
    ):
        w.add_scalar(tag, value, t)
    for tag, value in block_scalars(state.model).items():
        w.add_scalar(tag, value, t)


def evaluate(state: RunState) -> None:
    numbers = state.source.evaluate(state.model)
    state.last_val = numbers["loss/val"]
    for tag, value in numbers.items():
        state.writer.add_scalar(tag, value, state.tokens)
        state.history.setdefault(tag, []).append((state.tokens, float(value)))
    state.log.line(
        "eval",
        step=state.step,
        tokens=state.tokens,
        train_loss=state.last_finite,
        **{tag.replace("/", "_"): value for tag, value in numbers.items()},
    )


def run_probes(state: RunState, probes_cfg: dict | None) -> dict:
    if not probes_cfg or not probes_cfg.get("enabled"):
        return {}
    numbers, images = state.source.probe(state.model, probes_cfg, state.device)
    for name, value in numbers.items():
        state.writer.add_scalar(f"probe/{name}", value, state.tokens)
    if images:
        from PIL import Image  # here, not at the top: only probes that return pictures need it

        folder = state.run_dir / "probes"
        folder.mkdir(exist_ok=True)
        for name, image in images.items():
            state.writer.add_image(f"probe/{name}", image, state.tokens, dataformats="HWC")
            Image.fromarray(np.asarray(image)).save(folder / (name.replace("/", "_") + ".png"))
    return {k: float(v) for k, v in numbers.items()}


def periodic(state: RunState, stops: StopSignals) -> str | None:
    """Evaluation, periodic probes, checkpoint and the stop requests after a step. Returns
    ``"stopped"`` when the run stops early as asked; raises :class:`Interrupted` on a signal."""
    sch, step, last = state.schedule, state.step, state.step == state.total_steps
    if step % sch.eval_every == 0 or last:
        evaluate(state)
    if sch.probe_every and step % sch.probe_every == 0 and not last:
        # numbers only during training; pictures are drawn once, at the end
        run_probes(state, {**state.resolved["probes"], "images": False})
    saved = step % sch.ckpt_every == 0 or last
    if saved:
        save(state)
    if stops.received is not None:
        if not saved:
            save(state)
        state.log.line("signal", name=stops.received, step=step, tokens=state.tokens)
        raise Interrupted(
            f"stopped by {stops.received} at step {step} of {state.total_steps} ({state.tokens:,} tokens); "
            f"checkpoint saved in {state.run_dir}. Run the same command again to resume."
        )
    if sch.stop_after is not None and step >= sch.stop_after and not last:
        if not saved:
            save(state)
        return "stopped"
    return None


def train(state: RunState, stops: StopSignals, bar) -> str:
    """Steps until the budget is spent, the loss diverges or a stop is asked for. Returns the status."""
    window_start, window_tokens = time.perf_counter(), 0
    with stops.deferred():
        while state.step < state.total_steps:
            loss, grad, lr = one_step(state)
            if not (math.isfinite(loss) and math.isfinite(grad)):
                note_divergence(state, loss, grad)
                return "diverged"
            state.last_finite = loss
            window_tokens += state.tokens_per_step
            bar.update(state.tokens_per_step)
            if state.step % state.schedule.log_every == 0 or state.step == state.total_steps:
                elapsed = time.perf_counter() - window_start
                log_step(state, loss, grad, lr, window_tokens / elapsed if elapsed > 0 else float("nan"))
                bar.set_postfix(loss=f"{loss:.3f}")
                window_start, window_tokens = time.perf_counter(), 0
            status = periodic(state, stops)
            if status is not None:
                return status
    return "completed"


# --- finish ----------------------------------------------------------------------------------


def finish(state: RunState, status: str) -> records.RunSummary:
    """Final probes and numbers into the summary; ``summary.json`` unless the run only paused."""
    s = state.summary
    s.status, s.step, s.tokens = status, state.step, state.tokens
    s.train_flops = state.tokens * state.flops_per_token
    s.final_train_loss, s.final_val_loss = state.last_finite, state.last_val
    if status == "completed":
        s.probes = run_probes(state, state.resolved.get("probes"))
        for name, value in state.source.final_metrics(
            state.history, state.total_steps * state.tokens_per_step
        ).items():
            s.curve_metrics[name] = value
            state.writer.add_scalar(f"final/{name}", value, state.tokens)
        state.writer.add_scalar("final/val_loss", state.last_val, state.tokens)
        state.writer.add_scalar("final/train_loss", state.last_finite, state.tokens)
    state.writer.flush()
    s.wall_seconds = time.time() - state.started
    if status != "stopped":
        records.write_summary(state.run_dir, s)
    state.log.line(
        "finish",
        status=status,
        step=state.step,
        tokens=state.tokens,
        val_loss=state.last_val,
        train_loss=state.last_finite,
        seconds=round(s.wall_seconds, 1),
    )
    return s


def open_writer(state: RunState):
    """TensorBoard writer for the run folder. Everything up to a checkpoint's step was flushed
    before the checkpoint was written, so on resume TensorBoard is told to drop only what an earlier
    attempt logged after it (``purge_step``) and the curve has no duplicated steps."""
    # here, not at the top: torch.utils.tensorboard imports tensorboard (a second or so), which
    # the pre-flight and the report's other paths never need
    from torch.utils.tensorboard import SummaryWriter
    from torch.utils.tensorboard.summary import hparams

    writer = SummaryWriter(log_dir=str(state.run_dir), purge_step=state.tokens + 1 if state.step else None)
    if state.step == 0:
        exp, ssi, sei = hparams(
            hparams_of(state.info.choices, state.resolved), {"final/val_loss": 0.0, "final/train_loss": 0.0}
        )
        for s in (exp, ssi, sei):
            writer.file_writer.add_summary(s)
        writer.add_text("config", "```\n" + OmegaConf.to_yaml(state.cfg, resolve=True) + "\n```", 0)
    return writer


def progress_label(cell: str, seed: int, limit: int = 40) -> str:
    """A short progress-bar label: the cell's chosen values (``attention=differential,data.n_keys=64``
    -> ``differential 64``), cut to ``limit`` characters, and the seed, so two runs of one cell
    sharing a terminal can be told apart."""
    values = " ".join(part.split("=", 1)[-1] for part in cell.split(",") if part) or "default"
    if len(values) > limit:
        values = values[: limit - 3] + "..."
    return f"{values} seed {seed}"


def progress_bar(state: RunState):
    return tqdm(
        total=state.total_steps * state.tokens_per_step,
        initial=state.tokens,
        unit="tok",
        unit_scale=True,
        desc=progress_label(state.info.cell or state.run_dir.name, state.resolved["seed"]),
        disable=not state.resolved["runtime"]["progress"],
        dynamic_ncols=True,
        leave=False,
        position=state.info.slot,
    )


def run(cfg, info: RunInfo, parallel_jobs: int | None = None) -> records.RunSummary:
    """Train one run to its budget (resuming if a checkpoint exists). Returns the summary.

    Raises :class:`Interrupted` after writing a checkpoint when SIGINT or SIGTERM arrives during
    training, and ``records.CheckpointError`` (before any file of the folder is rewritten; stale
    temporary files of a killed writer are cleared first) when the folder's
    checkpoint is damaged or belongs to another config. The TensorBoard writer is closed (flushed)
    on every way out: the event files of a diverged, failed or interrupted run are kept whole.
    """
    with StopSignals() as stops, use_kernels(cfg.runtime.get("kernels", "fast")):
        state, saved = prepare(cfg, info, parallel_jobs)
        if saved is not None:
            resume(state, saved)
            del saved
        with open_writer(state) as state.writer:
            bar = progress_bar(state)
            try:
                status = train(state, stops, bar)
            finally:
                bar.close()
            return finish(state, status)
