"""The training job: a backbone plus the shared head, trained on point-cloud shards on the CPU.

``train_classifier`` takes plain arguments and can be called from a notebook; the command line
(``shapes train``) builds the backbone from config and calls it. Under ``torchrun`` with more
than one process the model is wrapped in DistributedDataParallel (gloo on CPU).

Resuming: ``resume.pt`` in the run folder holds everything the loop needs to go on as if it had
never stopped (weights, optimiser, the random-number states of Python, numpy and torch and the
run's own generator, the epoch's order and position in it, the step, the time spent, the history
and the best so far). It is written every ``save_every`` steps, at the end of every epoch and when
Ctrl-C or SIGTERM stop the run. While the loop runs those signals are only noted, and acted on
before the next step (a validation under way finishes first), so a stop always falls between two
steps; a second one stops at once, without a new ``resume.pt``. ``train_classifier(..., resume=True)`` (``shapes train resume=RUN_DIR``) goes on
from it, and on one thread with deterministic kernels it ends with the same weights, bit for bit,
as a run that was never stopped. A run killed outright (SIGKILL, power cut) loses the steps after
the last ``resume.pt``; they are done again the same way.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import torch
from torch import nn

from shapes import _checks as check
from shapes._atomic import atomic_path, signals_deferred, write_json
from shapes._runtime import choose_device, progress, set_threads, versions
from shapes._resume import RESUMABLE, StopRequests, check_resumable, read_resume_state, rng_states, set_rng_states
from shapes.backbones import Backbone, Classifier, build_backbone
from shapes.data import CloudSplit, load_split, read_meta
from shapes.errors import ConfigError, Interrupted, TrainingError
from shapes.geometry import POSE_REGIMES, check_regime, random_poses
from shapes.run import CHECKPOINT, HISTORY, RESUME, BackboneRecord, HeadRecord, RunMeta, logits_under_poses
from shapes.run import save_checkpoint
from shapes.seeding import seed_everything, torch_generator

__all__ = ["TrainSettings", "check_settings", "train_classifier", "resume_training", "lr_factor", "reflect_to_twins",
           "read_resume_state"]


TRAIN_REGIMES = POSE_REGIMES[:3]  # a mirrored training pose would teach a handed part its twin's shape


@dataclass
class TrainSettings:
    epochs: int = 30  # the demo catalog's small parts converge in 20-40 epochs
    batch_size: int = 16  # small batches train faster per epoch on 2 cores and regularise; the global
    # batch: under torchrun each of the W processes takes batch_size / W of it
    lr: float = 2e-3  # AdamW peak rate after warm-up
    weight_decay: float = 1e-4  # mild: the head is small, the data is clean
    warmup: float = 0.05  # fraction of steps with a linear ramp-up, so early large gradients don't derail
    poses: str = "cad"  # cad | upright | any: how training clouds are turned each step
    jitter: float = 0.0  # Gaussian noise (in RMS radii) added to training points; 0 keeps CAD clean
    mirror: float = 0.0  # share of training clouds reflected (x -> -x) and labelled as their mirror
    # twin (achiral classes keep theirs): the very same points under both hands, so a model cannot
    # tell twins apart by anything but their handedness
    head_hidden: int = 128  # width of the shared head
    dropout: float = 0.1  # in the head only
    seed: int = 0
    threads: int | None = None  # torch threads; None keeps torch's default
    device: str = "cpu"  # cpu | cuda | auto
    max_minutes: float | None = None  # a wall-time budget: the learning rate anneals to 0 by then and
    # training stops there, keeping the best checkpoint (epochs is then an upper bound)
    save_every: int | None = None  # steps between resumable states (resume.pt) besides the one at each
    # epoch's end; None: per epoch only (a state costs about three copies of the weights on disk)
    extra: dict = field(default_factory=dict)  # free-form metadata stored in the checkpoint (e.g. resolved config)


def check_settings(s: TrainSettings) -> TrainSettings:
    """Type- and range-check every option before any work; each failure names ``train.<option>``."""
    check.integer("train.epochs", s.epochs, low=1)
    check.integer("train.batch_size", s.batch_size, low=1)
    check.number("train.lr", s.lr, low=0, low_open=True)
    check.number("train.weight_decay", s.weight_decay, low=0)
    check.number("train.warmup", s.warmup, low=0, high=1, high_open=True)
    check_regime(s.poses, TRAIN_REGIMES, "train.poses")
    check.number("train.jitter", s.jitter, low=0)
    check.number("train.mirror", s.mirror, low=0, high=1)
    check.integer("train.head_hidden", s.head_hidden, low=1)
    check.number("train.dropout", s.dropout, low=0, high=1, high_open=True)
    check.integer("seed", s.seed, low=0)
    check.optional(check.integer, "train.threads", s.threads, low=1)
    check.choice("train.device", s.device, ("cpu", "cuda", "auto"))
    check.optional(check.number, "train.max_minutes", s.max_minutes, low=0, low_open=True)
    check.optional(check.integer, "train.save_every", s.save_every, low=1)
    if not isinstance(s.extra, dict):
        check.fail("extra", "a dict of metadata", repr(s.extra))
    return s


def _finite_weights(model: nn.Module) -> bool:
    return all(bool(torch.isfinite(p).all()) for p in model.parameters())


def lr_factor(progress: float, warmup: float) -> float:
    """Linear warm-up over the first ``warmup`` share of training, then a cosine down to 0.

    ``progress`` in [0, 1] is the share of training done: of the steps, or of the time budget when
    that runs out first, so a run cut short by ``max_minutes`` still ends annealed.
    """
    if progress < warmup:
        return max(progress / warmup, 1e-3)
    t = (progress - warmup) / max(1.0 - warmup, 1e-9)
    return 0.5 * (1.0 + math.cos(math.pi * min(t, 1.0)))


def _distributed() -> tuple[int, int]:
    world = int(os.environ.get("WORLD_SIZE", "1"))
    rank = int(os.environ.get("RANK", "0"))
    if world > 1 and not torch.distributed.is_initialized():
        torch.distributed.init_process_group("nccl" if torch.cuda.is_available() else "gloo")
    return rank, world


def reflect_to_twins(points: torch.Tensor, labels: torch.Tensor, twin_of: torch.Tensor,
                     chosen: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Mirror the chosen clouds in the plane x = 0 and relabel them as their mirror twins.

    points : (B, N, 3); labels : (B,) class indices; twin_of : (C,) index of each class's twin (itself
    for an achiral class); chosen : (B,) bool. Returns new (points, labels); the others are untouched.
    """
    flipped = points * points.new_tensor([-1.0, 1.0, 1.0])  # (B, N, 3)
    return (torch.where(chosen[:, None, None], flipped, points),
            torch.where(chosen, twin_of[labels], labels))


@torch.no_grad()
def _validate(model: nn.Module, split: CloudSplit, poses: str, seed: int, batch_size: int,
              device: torch.device) -> tuple[float, float]:
    """Accuracy and mean cross-entropy on the validation clouds, each turned by a seeded pose; the clouds
    are read from the split one batch at a time."""
    model.eval()
    gen = torch_generator(seed)
    rot = random_poses(poses, len(split), generator=gen, dtype=torch.float32, device=device)
    correct, loss = 0, 0.0
    for i in range(0, len(split), batch_size):
        rows = range(i, min(i + batch_size, len(split)))
        points, normals, labels = (torch.from_numpy(a).to(device) for a in split.batch(rows))
        logits = logits_under_poses(model, points, rot[i:i + batch_size], batch_size, normals)
        correct += int((logits.argmax(-1) == labels).sum())
        loss += float(nn.functional.cross_entropy(logits, labels, reduction="sum"))
    n = max(len(split), 1)
    return correct / n, loss / n


def train_classifier(backbone: Backbone, data_dir: str | os.PathLike, run_dir: str | os.PathLike,
                     settings: TrainSettings | None = None, resume: bool = False) -> Path:
    """Train ``backbone`` + head on the shards in ``data_dir``; write the best checkpoint to ``run_dir``.

    Returns the checkpoint path. Files written: ``checkpoint.pt`` (best validation accuracy),
    ``train_history.json`` (one row per epoch, and ``status``: complete, interrupted or diverged; it
    says interrupted while training is under way, so a run killed outright stays so) and
    ``resume.pt`` (the loop's latest state; see the module's docstring). All are renamed into place
    when complete. A non-finite loss or weights raise :class:`TrainingError` and a Ctrl-C
    :class:`shapes.errors.Interrupted`; either way the last good checkpoint is kept.

    ``resume=True`` goes on from ``run_dir/resume.pt``: the backbone, the dataset and the settings
    must be the run's own (only ``threads`` and ``device`` may differ); the weights the backbone was
    built with are replaced by the saved ones.
    """
    s = check_settings(settings or TrainSettings())
    run_dir = Path(run_dir)
    state = read_resume_state(run_dir) if resume else None
    set_threads(s.threads)
    seed_everything(s.seed)  # the head's weights; the caller seeds before building the backbone
    device = choose_device(s.device)
    rank, world = _distributed()
    meta = read_meta(data_dir)
    # memory maps: each step copies its batch's clouds (points and normals, which turn with them), no more
    train, val = load_split(data_dir, "train"), load_split(data_dir, "val")
    checkpoint_meta = RunMeta.for_dataset(
        meta, data_dir, train.points.shape[1], BackboneRecord(backbone.name, backbone.config_dict(), backbone.symmetry),
        head=HeadRecord(s.head_hidden, s.dropout), train={k: v for k, v in asdict(s).items() if k != "extra"},
        versions=versions(), extra=dict(s.extra))
    twin_of = torch.as_tensor(checkpoint_meta.twin_index(), device=device)  # (C,)
    # a handed class whose twin is not in the catalog has a mirror image that is no class: never mirrored
    no_twin = set((meta.get("twin_check") or {}).get("unpaired", []))
    mirrorable = torch.tensor([c not in no_twin for c in checkpoint_meta.classes], device=device)  # (C,)
    if state is not None:
        check_resumable(state, asdict(s), backbone, world, len(train))

    model = Classifier(backbone, len(checkpoint_meta.classes), hidden=s.head_hidden, dropout=s.dropout).to(device)
    net = nn.parallel.DistributedDataParallel(model) if world > 1 else model
    decay = [p for n, p in model.named_parameters() if p.dim() > 1]
    no_decay = [p for n, p in model.named_parameters() if p.dim() <= 1]
    opt = torch.optim.AdamW([{"params": decay, "weight_decay": s.weight_decay},
                             {"params": no_decay, "weight_decay": 0.0}], lr=s.lr)
    if s.batch_size % world:
        raise ConfigError(f"train.batch_size should be a multiple of the {world} processes (it is the global batch, "
                          f"split evenly between them), got {s.batch_size} instead.")
    if world > 1:  # dropout masks: drawn per process, each from its own stream (the weights are rank 0's)
        torch.manual_seed(s.seed + 7919 * rank)
    steps_per_epoch = math.ceil(len(train) // world * world / s.batch_size)
    total = steps_per_epoch * s.epochs
    budget = 60.0 * s.max_minutes if s.max_minutes else math.inf  # seconds
    gen = torch_generator(s.seed)  # the same on every rank: see the permutation below
    loss_fn = nn.CrossEntropyLoss()

    history, best, started, step, out_of_time = [], (-1.0, -math.inf), time.perf_counter(), 0, False
    ckpt = run_dir / CHECKPOINT
    epoch, saved = 0, None  # the epoch under way, the epoch of the checkpoint on disk
    # where the loop stands: the epoch's full permutation, the next batch's place in this rank's
    # share of it, the losses so far, and whether the epoch's end (validation, records) is done
    perm, position, losses, epoch_done, first = None, 0, [], True, 1
    if state is not None:
        model.load_state_dict(state["model"])
        opt.load_state_dict(state["optimizer"])
        checkpoint_meta = RunMeta.from_dict(state["meta"])  # the run's own record (its config, its versions)
        history, best, saved, step = list(state["history"]), tuple(state["best"]), state["saved"], state["step"]
        started = time.perf_counter() - state["elapsed"]
        epoch, epoch_done = state["epoch"], state["epoch_done"]
        if not epoch_done:
            perm, position, losses = state["perm"], state["position"], list(state["losses"])
        first = epoch + 1 if epoch_done else epoch
        set_rng_states(state["rng"], gen, device)  # last: building the model above drew from them
        if world > 1:  # rank 0's dropout stream was saved; every rank starts a stream of its own
            torch.manual_seed(s.seed + 7919 * rank + step)

    def kept() -> str:
        return (f"the best checkpoint so far (epoch {saved}) is kept at {ckpt}" if saved
                else "no checkpoint was written")

    def write_history(status: str) -> None:
        """``train_history.json`` with the run's status: complete, interrupted (also while training is
        under way) or diverged (``run=latest`` passes over the last two)."""
        if rank == 0 and (history or saved):
            write_json(run_dir / HISTORY, {"status": status, "history": history,
                                                        "best_val_accuracy": best[0], "best_epoch": saved,
                                                        "wall_seconds": time.perf_counter() - started})

    def save_state(status: str) -> None:
        """``resume.pt``: the loop as it stands between two steps (rank 0 writes it)."""
        if rank != 0:
            return
        payload = {"format": 1, "status": status, "epoch": epoch, "epoch_done": epoch_done,
                   "perm": None if epoch_done else perm.cpu(), "position": position,
                   "losses": list(losses), "step": step, "elapsed": time.perf_counter() - started,
                   "history": history, "best": list(best), "saved": saved,
                   "model": {k: v.detach().cpu() for k, v in model.state_dict().items()},
                   "optimizer": opt.state_dict(), "rng": rng_states(gen, device),
                   "settings": asdict(s), "meta": checkpoint_meta.to_dict(), "world": world, "train_clouds": len(train),
                   "data": os.path.abspath(data_dir)}
        with atomic_path(run_dir / RESUME) as tmp:
            torch.save(payload, tmp)

    def diverged(what: str) -> TrainingError:
        return TrainingError(f"training diverged in epoch {epoch}, step {step + 1}: {what} "
                             f"(train.lr={s.lr:g}; expected a finite loss, lower train.lr); {kept()}.")

    stops = StopRequests().__enter__()  # left in the `finally` below
    try:
        for epoch in range(first, s.epochs + 1):
            net.train()
            if epoch_done:  # a new epoch (not one resumed part-way)
                with signals_deferred():
                    perm = torch.randperm(len(train), generator=gen)
                    position, losses, epoch_done = 0, [], False
            # every rank takes the same permutation (same seed) and the same global batches, of which it
            # trains on an equal share: DDP's averaged gradient is the one process's over the global batch
            order = perm[: len(perm) // world * world]
            t0 = time.perf_counter()
            for start in progress(range(position, len(order), s.batch_size), desc=f"epoch {epoch}/{s.epochs}"):
                elapsed = time.perf_counter() - started
                if world > 1:  # every rank must take the same steps: the latest clock and any stop decide
                    flag = torch.tensor([float(elapsed), float(stops.status or 0)], dtype=torch.float64, device=device)
                    torch.distributed.all_reduce(flag, torch.distributed.ReduceOp.MAX)
                    elapsed, stop = float(flag[0]), int(flag[1])
                    stops.status = stop or None
                progress_done = min(max(step / total, elapsed / budget), 1.0)
                if progress_done >= 1.0 and step > 0:  # at least one step, so there is a checkpoint
                    out_of_time = True
                    break
                stops.check()  # a Ctrl-C or SIGTERM noted since the last step stops here
                for group in opt.param_groups:
                    group["lr"] = s.lr * lr_factor(progress_done, s.warmup)
                batch = order[start:start + s.batch_size]  # the global batch, the same on every rank
                # draws for the whole global batch, as one process makes them; this rank keeps its share
                share = len(batch) // world
                mine = slice(rank * share, (rank + 1) * share)
                x, n, y = (torch.from_numpy(a).to(device) for a in train.batch(batch[mine].numpy()))
                rot = random_poses(s.poses, len(batch), generator=gen, dtype=torch.float32)[mine].to(device)
                x, n = x @ rot.transpose(-1, -2), n @ rot.transpose(-1, -2)  # (b, N, 3), turned together
                if s.mirror > 0:
                    chosen = (torch.rand(len(batch), generator=gen)[mine] < s.mirror).to(device) & mirrorable[y]
                    n, _ = reflect_to_twins(n, y, twin_of, chosen)  # an outward normal reflects with its surface
                    x, y = reflect_to_twins(x, y, twin_of, chosen)
                if s.jitter > 0:
                    noise = torch.randn((len(batch),) + tuple(x.shape[1:]), generator=gen)[mine]
                    x = x + s.jitter * noise.to(device)
                loss = loss_fn(net(x, None, n), y)
                if not bool(torch.isfinite(loss.detach())):  # every rank sees its own; DDP keeps weights equal
                    raise diverged(f"the loss is {float(loss.detach())}")
                opt.zero_grad(set_to_none=True)
                loss.backward()
                nn.utils.clip_grad_norm_(model.parameters(), 5.0)
                opt.step()
                step += 1
                position = start + s.batch_size
                losses.append(float(loss.detach()))
                if s.save_every and step % s.save_every == 0:
                    save_state("interrupted")
            if not losses:  # the budget ran out at the start of an epoch: nothing new to validate
                break
            train_seconds = time.perf_counter() - t0
            if not _finite_weights(model):  # the last step of the epoch overflowed: never save it
                raise diverged("the weights are no longer finite")
            val_acc, val_loss = _validate(model, val, s.poses, seed=s.seed, batch_size=4 * s.batch_size,
                                          device=device)
            if not math.isfinite(val_loss):
                raise diverged(f"the validation loss is {val_loss}")
            mean_loss = float(np.mean(losses))
            if world > 1:  # each rank's losses are over its share: the global batch's mean is theirs
                total_loss = torch.tensor([mean_loss], dtype=torch.float64, device=device)
                torch.distributed.all_reduce(total_loss)
                mean_loss = float(total_loss) / world
            row = {"epoch": epoch, "steps": step, "loss": mean_loss, "val_accuracy": val_acc,
                   "val_loss": val_loss, "seconds": time.perf_counter() - t0, "train_seconds": train_seconds,
                   "lr": opt.param_groups[0]["lr"]}
            last = out_of_time or epoch == s.epochs
            with signals_deferred():  # the records, the checkpoint and the state change together
                history.append(row)
                epoch_done = True
                if rank == 0:
                    print(f"epoch {epoch:3d}  loss {row['loss']:.4f}  val {val_acc:.3f} (loss {val_loss:.3f})  "
                          f"({row['seconds']:.1f} s)", flush=True)
                    # the validation split is small: among equal accuracies the lower loss is the surer model
                    if (val_acc, -val_loss) > best:
                        best = (val_acc, -val_loss)
                        save_checkpoint(ckpt, model, checkpoint_meta.scored(epoch, val_acc, val_loss))
                        saved = epoch
                save_state("complete" if last else "interrupted")
                write_history("complete" if last else "interrupted")
            if world == 1:  # under torchrun the next step's all-reduce makes every rank agree first
                stops.check()
            if out_of_time:
                if rank == 0:
                    print(f"stopped in epoch {epoch}: train.max_minutes={s.max_minutes} reached "
                          "(the learning rate had annealed to 0 by then)", flush=True)
                break
    except TrainingError:
        write_history("diverged")
        raise
    except KeyboardInterrupt as exc:  # Ctrl-C or SIGTERM, noted between steps (or twice: at once)
        with signals_deferred():
            if not stops.hard:  # between two steps: the state is whole
                save_state("interrupted")
            write_history("interrupted")
        status = getattr(exc, "status", 130)
        how = "SIGTERM" if status == 143 else "Ctrl-C"
        raise Interrupted(f"training interrupted by {how} in epoch {epoch}; {kept()}; continue it with "
                          f"`shapes train resume={run_dir}`.", status) from None
    finally:
        stops.__exit__()
    with signals_deferred():  # also when the budget ran out at the start of an epoch
        save_state("complete")
        write_history("complete")
    if world > 1:
        torch.distributed.barrier()
    return ckpt


def resume_training(run_dir: str | os.PathLike, **changes) -> tuple[Path, TrainSettings]:
    """Go on with the run in ``run_dir`` from its ``resume.pt``, with its own settings, backbone and dataset;
    ``changes`` may give ``threads`` and ``device`` anew. Returns the checkpoint path and the settings."""
    state = read_resume_state(run_dir)
    unknown = sorted(set(changes) - set(RESUMABLE))
    if unknown:
        raise ConfigError(f"train.{unknown[0]} cannot change when a run is resumed (only train.threads and "
                          "train.device can).")
    settings = check_settings(TrainSettings(**{**state["settings"], **changes}))
    set_threads(settings.threads)
    seed_everything(settings.seed)
    recorded = RunMeta.from_dict(state["meta"]).backbone
    backbone = build_backbone(recorded.name, **recorded.options)
    print(f"resuming {run_dir} at epoch {state['epoch'] + state['epoch_done']}, step {state['step']}", flush=True)
    return train_classifier(backbone, state["data"], run_dir, settings, resume=True), settings
