"""Lightning integration: :class:`ShiftCallback`, a :class:`~shiftwatch.ShiftMonitor` in
one line of ``Trainer(callbacks=[...])``.

::

    from shiftwatch.lightning import ShiftCallback
    trainer = Trainer(callbacks=[ShiftCallback(every_n_steps=50, on_alert="stop")])

This is the only module of shiftwatch that imports Lightning (``lightning.pytorch``);
``import shiftwatch`` does not.  Without Lightning installed, importing it raises
:class:`ModuleNotFoundError` naming ``pip install shiftwatch[lightning]``.

How the callback maps Lightning onto the monitor
    * ``setup``: the monitor is built on the LightningModule, so its hooks are registered
      once, before ``configure_model`` runs and before any forward (a submodule compiled
      with ``torch.compile`` in ``configure_model`` is traced later, with the hooks in
      place).  The hooks stay registered and are armed only for sampled batches.
      They are removed in ``teardown`` and ``on_exception``.
    * x-axis: ``trainer.global_step`` (optimizer steps).  With gradient accumulation all
      the batches of a sampled optimizer step are summarised and merged exactly, so one
      sample describes one optimizer step's data whatever ``accumulate_grad_batches`` is.
    * sanity-check batches are ignored.  Validation batches (up to ``val_batches`` per
      validation run) are summarised as phase ``"val"``, merged over the run and compared
      with the *training* reference, the previous validation run and (``vs_train``) the
      latest sampled training step before it -- up to ``every_n_steps`` optimizer steps
      earlier, so weight change adds to the train/eval mismatch there; they appear under
      their own TensorBoard tags (``shift.val.*``) and event-log records (``"phase":
      "val"``) and are judged by ``phase="val"`` rules (:func:`validation_rules` are added
      to the built-in rules).
    * writing: only global rank zero writes.  The TensorBoard writer of the trainer's
      ``TensorBoardLogger`` is shared when there is one; otherwise (CSV logger, no logger)
      the monitor opens its own writer.  ``events.jsonl`` lives in the same directory
      (the logger's ``log_dir``, else ``trainer.log_dir``), unless ``log_dir`` is given.
    * several processes (DDP): every rank's summaries are merged with one collective per
      sampled step (:mod:`shiftwatch.distributed`) before any metric is computed, so all
      ranks see the same numbers.  A failing alert with ``on_alert="stop"`` sets
      ``trainer.should_stop`` on every rank at the same step through
      ``trainer.strategy.reduce_boolean_decision``, which every rank calls at every
      sampled step (and every step when ``check_finite_every_step``), alert or not.
      ``on_alert="raise"`` raises :class:`~shiftwatch.ShiftAlertError` on every rank.
      ``Trainer(min_steps=..., min_epochs=...)`` delay a requested stop.
    * checkpoints: :meth:`ShiftCallback.state_dict` is the monitor's state (tensors and
      plain Python values only), stored under :attr:`ShiftCallback.state_key`; resuming
      with ``fit(ckpt_path=...)`` continues the step count, reference, previous samples
      and rule counters.
    * mixed precision: float16/bfloat16 layer inputs are summarised in float32.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

try:
    import lightning.pytorch as pl
    from lightning.pytorch.callbacks import Callback
    from lightning.pytorch.loggers import TensorBoardLogger
except ModuleNotFoundError as exc:  # pragma: no cover - exercised in a subprocess test
    if (exc.name or "").split(".")[0] != "lightning":
        raise
    raise ModuleNotFoundError(
        "shiftwatch.lightning needs Lightning ('lightning' >= 2.1), which is not installed; "
        "install it with: pip install shiftwatch[lightning]",
        name=exc.name,
    ) from exc

from torch import nn

from .distributed import SummaryReducer
from .errors import ConfigError, ShiftAlertError
from .monitor import ShiftMonitor
from .rules import ENTRY, Rule, default_rules

__all__ = ["ShiftCallback", "validation_rules"]


def validation_rules() -> list[Rule]:
    """Rules for phase ``"val"`` that :class:`ShiftCallback` adds to the built-in ones
    (when ``rules`` is left at ``None``).

    * ``val-entry-shift`` / ``val-entry-scale`` (warn): the mean or the spread of an
      entry layer's input (the data as it enters the model) during validation differs
      from the training reference by at least 6 noise floors.  That says the validation
      data come from another distribution than the training data did; it says nothing
      about accuracy.  Inner layers are not judged by default: in eval mode their inputs
      differ from training by design (dropout off, batch norm on running statistics)
      and drift as weights learn; their numbers are still logged.
    """
    entry = (ENTRY,)
    return [
        Rule("mean_shift", against="reference", threshold=6.0, layers=entry, severity="warn",
             phase="val", name="val-entry-shift"),
        Rule("log_std_ratio", against="reference", threshold=6.0, layers=entry,
             severity="warn", phase="val", name="val-entry-scale"),
    ]


def _names(value: str | Iterable[str] | None) -> tuple[str, ...] | None:
    if value is None:
        return None
    return (value,) if isinstance(value, str) else tuple(value)


class ShiftCallback(Callback):
    """Watch the LightningModule's layer inputs during ``fit`` (and ``validate``).

    Options are those of :class:`~shiftwatch.ShiftMonitor` (see there) except ``model``
    (the LightningModule) and ``reducer`` (always the cross-process merge), plus
    ``val_batches``.

    Args:
        log_dir: where ``events.jsonl`` goes (and TensorBoard events, when no
            ``TensorBoardLogger`` is attached); default: the ``TensorBoardLogger``'s
            directory, else ``trainer.log_dir``.
        every_n_steps, warmup_steps, reference_steps: sampling schedule in optimizer steps
            (``trainer.global_step``).
        layers, exclude, types, outputs: which layers to watch.
        rules: ``None``: the built-in rules plus :func:`validation_rules`; a list of
            rules or a TOML path: exactly those.
        on_alert: ``"record"``, ``"stop"`` (``trainer.should_stop`` on every rank) or
            ``"raise"`` (:class:`~shiftwatch.ShiftAlertError` on every rank).
        reference, bins, max_hist_values, check_finite_every_step: as for the monitor.
        tensorboard: ``None``: the logger's writer if there is a ``TensorBoardLogger``,
            else our own writer when TensorBoard is installed; ``False``: none; ``True``:
            required.
        val_batches: validation batches summarised per validation run (``None``: all,
            ``0``: no validation monitoring).

    Raises:
        ConfigError: a bad option (checked here, before training starts).
    """

    def __init__(
        self,
        log_dir: str | os.PathLike | None = None,
        *,
        every_n_steps: int = 50,
        warmup_steps: int = 0,
        reference_steps: int = 5,
        layers: str | Iterable[str] | None = None,
        exclude: str | Iterable[str] | None = None,
        types: Sequence[type | str] | None = None,
        outputs: bool = False,
        rules: Sequence[Rule] | str | os.PathLike | None = None,
        on_alert: str = "record",
        reference: str | os.PathLike | None = None,
        bins: int | None = None,
        max_hist_values: int | None = 16384,
        check_finite_every_step: bool = False,
        tensorboard: bool | None = None,
        val_batches: int | None = None,
    ) -> None:
        if tensorboard not in (None, True, False):
            raise ConfigError(
                f"'tensorboard' must be None, True or False (got {tensorboard!r}); the "
                "callback finds the TensorBoardLogger's writer itself"
            )
        if val_batches is not None and (
            isinstance(val_batches, bool) or not isinstance(val_batches, int) or val_batches < 0
        ):
            raise ConfigError(
                f"'val_batches' must be an integer >= 0 or None (got {val_batches!r}); "
                "None summarises every validation batch, 0 none"
            )
        self.log_dir = None if log_dir is None else os.fspath(log_dir)
        self.val_batches = val_batches
        self.tensorboard = tensorboard
        self._options: dict[str, Any] = {
            "every_n_steps": every_n_steps, "warmup_steps": warmup_steps,
            "reference_steps": reference_steps, "layers": _names(layers),
            "exclude": _names(exclude), "types": None if types is None else tuple(types),
            "outputs": outputs,
            "rules": rules if rules is None or isinstance(rules, (str, os.PathLike))
            else list(rules),
            "on_alert": on_alert, "reference": reference, "bins": bins,
            "max_hist_values": max_hist_values,
            "check_finite_every_step": check_finite_every_step,
        }
        self._validate_options()
        self.monitor: ShiftMonitor | None = None
        self._last_alerts: list = []
        self._last_reason: str | None = None
        self._pending_state: Mapping[str, Any] | None = None
        self._batch_step: int | None = None  # global_step when the current batch began
        self._val_left: int | None = 0  # validation batches still to summarise this run
        self._val_on = False

    def _validate_options(self) -> None:
        """Fail at construction, not at the first sampled step: build a throwaway monitor
        on a one-layer model with the options that do not depend on the real model (so
        the messages are the monitor's own).  Rule files are parsed here too."""
        o = self._options
        probe = ShiftMonitor(
            nn.Sequential(nn.Linear(1, 1)), None, every_n_steps=o["every_n_steps"],
            warmup_steps=o["warmup_steps"], reference_steps=o["reference_steps"],
            outputs=o["outputs"], on_alert=o["on_alert"], bins=o["bins"],
            max_hist_values=o["max_hist_values"],
            check_finite_every_step=o["check_finite_every_step"], tensorboard=False,
        )
        probe.close()
        rules = o["rules"]
        if isinstance(rules, (str, os.PathLike)):
            from .rules import load_rules

            load_rules(rules)
        elif rules is not None and not all(isinstance(r, Rule) for r in rules):
            raise ConfigError(
                "'rules' must be None, a TOML path or a list of shiftwatch.rules.Rule "
                f"(got {[type(r).__name__ for r in rules]})"
            )

    # ------------------------------------------------------------------ identity
    @property
    def state_key(self) -> str:
        """Key of this callback's state in a checkpoint, built from the options that
        define what is watched and how it is sampled (so two callbacks watching different
        layers can live in one checkpoint)."""
        o = self._options
        types = None if o["types"] is None else tuple(
            t if isinstance(t, str) else t.__qualname__ for t in o["types"]
        )
        return self._generate_state_key(
            layers=o["layers"], exclude=o["exclude"], types=types, outputs=o["outputs"],
            every_n_steps=o["every_n_steps"], warmup_steps=o["warmup_steps"],
            reference_steps=o["reference_steps"], bins=o["bins"],
        )

    @property
    def alerts(self) -> list:
        """The alerts of the current (or last) run of this process, as
        :class:`~shiftwatch.judge.Alert` records.  With ``strategy="ddp_spawn"`` the runs
        happen in child processes: read ``events.jsonl`` instead."""
        return list(self.monitor.alerts) if self.monitor is not None else list(self._last_alerts)

    @property
    def stop_reason(self) -> str | None:
        """Why the monitor asked to stop (the first failing alert's message), or ``None``."""
        return self.monitor.stop_reason if self.monitor is not None else self._last_reason

    # ------------------------------------------------------------------ set up / tear down
    def setup(self, trainer: pl.Trainer, pl_module: pl.LightningModule, stage: str) -> None:
        if stage not in ("fit", "validate") or self.monitor is not None:
            return
        o = dict(self._options)
        if o["rules"] is None:
            o["rules"] = default_rules() + validation_rules()
        log_dir, writer = self._where_to_write(trainer)
        self.monitor = ShiftMonitor(
            pl_module, log_dir, reducer=SummaryReducer(), tensorboard=writer, **o
        )
        self.monitor.disarm()  # the callback arms per batch (no sanity-check capture)
        if self._pending_state is not None:
            self.monitor.load_state_dict(self._pending_state)
            self.monitor.disarm()
            self._pending_state = None

    def _where_to_write(self, trainer: pl.Trainer) -> tuple[str | None, Any]:
        """``(log_dir, tensorboard option)`` for this rank: nothing on ranks other than
        global zero.  Every rank runs the same branches, so the collective inside
        ``trainer.log_dir`` (a broadcast) is called by all of them or none."""
        tb_logger = next((lg for lg in trainer.loggers if isinstance(lg, TensorBoardLogger)),
                         None)
        log_dir = self.log_dir
        if log_dir is None and tb_logger is None:
            log_dir = trainer.log_dir  # collective: every rank calls it
        if not trainer.is_global_zero:
            return None, False
        if log_dir is None:
            log_dir = tb_logger.log_dir
        if self.tensorboard is False:
            return log_dir, False
        if tb_logger is not None and _is_torch_writer(tb_logger.experiment):
            return log_dir, tb_logger.experiment
        return log_dir, self.tensorboard

    def teardown(self, trainer: pl.Trainer, pl_module: pl.LightningModule, stage: str) -> None:
        self._close()

    def on_exception(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, exception: BaseException
    ) -> None:
        self._close(reason=f"{type(exception).__name__}: {exception}")

    def _close(self, reason: str | None = None) -> None:
        if self.monitor is not None:
            # keep the state: a checkpoint saved after fit() (or a second fit() with
            # this callback) continues from it, as Lightning's own callbacks do
            self._pending_state = self.monitor.state_dict()
            self._last_alerts = list(self.monitor.alerts)
            self._last_reason = self.monitor.stop_reason
            self.monitor.close(reason=reason)
            self.monitor = None

    # ------------------------------------------------------------------ training
    def on_train_batch_start(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, batch: Any, batch_idx: int
    ) -> None:
        m = self.monitor
        if m is None:
            return
        self._batch_step = trainer.global_step
        if m.is_sampled(trainer.global_step):
            m.arm("train")  # every micro-batch of a sampled step: merged into one sample
        else:
            m.disarm()

    def on_train_batch_end(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, outputs: Any, batch: Any,
        batch_idx: int,
    ) -> None:
        m = self.monitor
        if m is None or self._batch_step is None:
            return
        m.disarm()
        s = self._batch_step
        if trainer.global_step == s:  # accumulating: the optimizer step is not done yet
            return
        self._batch_step = None
        error: ShiftAlertError | None = None
        try:
            m.step(global_step=s)
        except ShiftAlertError as exc:
            error = exc
        finally:
            m.disarm()  # step() re-arms per its own schedule; this callback arms per batch
        if m.is_sampled(s) or self._options["check_finite_every_step"]:
            self._sync_decision(trainer, s, error)

    # ------------------------------------------------------------------ validation
    def on_validation_epoch_start(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule
    ) -> None:
        self._val_on = (
            self.monitor is not None and not trainer.sanity_checking and self.val_batches != 0
        )
        self._val_left = self.val_batches

    def on_validation_batch_start(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, batch: Any, batch_idx: int,
        dataloader_idx: int = 0,
    ) -> None:
        if not self._val_on:
            return
        if self._val_left is None or self._val_left > 0:
            self.monitor.arm("val")
            if self._val_left is not None:
                self._val_left -= 1
        else:
            self.monitor.disarm()

    def on_validation_batch_end(
        self, trainer: pl.Trainer, pl_module: pl.LightningModule, outputs: Any, batch: Any,
        batch_idx: int, dataloader_idx: int = 0,
    ) -> None:
        if self._val_on:
            self.monitor.disarm()

    def on_validation_epoch_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        if not self._val_on:
            return
        self._val_on = False
        m = self.monitor
        m.disarm()
        error: ShiftAlertError | None = None
        try:
            m.observe(trainer.global_step)
        except ShiftAlertError as exc:
            error = exc
        self._sync_decision(trainer, trainer.global_step, error)

    # ------------------------------------------------------------------ decisions
    def _sync_decision(
        self, trainer: pl.Trainer, step: int, error: ShiftAlertError | None
    ) -> None:
        """Apply the monitor's decision on every rank at once.  Every rank calls the
        strategy's boolean reduction here whether or not it saw an alert: ranks that
        disagreed would otherwise stop (or raise) alone and leave the others waiting in
        their next collective."""
        m = self.monitor
        on_alert = m.on_alert
        if on_alert == "record":
            return
        wanted = error is not None if on_alert == "raise" else m.should_stop
        if not trainer.strategy.reduce_boolean_decision(bool(wanted), all=False):
            return
        if on_alert == "stop":
            trainer.should_stop = True
            return
        if error is None:  # another rank raised; merged statistics make this rare
            error = ShiftAlertError(
                f"shiftwatch stopped the run: a failing alert on another rank at step {step}",
                step=step, layer="", metric="", value=float("nan"),
                threshold=float("nan"),
            )
        raise error

    # ------------------------------------------------------------------ checkpoints
    def state_dict(self) -> dict[str, Any]:
        if self.monitor is not None:
            return self.monitor.state_dict()
        return dict(self._pending_state or {})

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        if not state_dict:
            return
        if self.monitor is None:  # restored before setup: applied when the monitor exists
            self._pending_state = state_dict
            return
        self.monitor.load_state_dict(state_dict)
        self.monitor.disarm()


def _is_torch_writer(writer: Any) -> bool:
    """Whether ``writer`` is torch's ``SummaryWriter`` (Lightning falls back to
    tensorboardX's, which the TensorBoard sink cannot share)."""
    try:
        from torch.utils.tensorboard import SummaryWriter
    except ImportError:
        return False
    return isinstance(writer, SummaryWriter)
