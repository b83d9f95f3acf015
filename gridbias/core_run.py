"""A run of any Python MD loop that stops itself: checkpoints of MD state, bias and frames, and the decision.

::

    from gridbias import stopping
    from gridbias.core_run import StoppingRun

    run = StoppingRun(bias, stopping.Converged() | stopping.MaxSteps(2_000_000), checkpoint="run.gbz",
                      checkpoint_every=100_000)
    x, v = (run.state["x"], run.state["v"]) if run.state else (x0, v0)
    while run.decision is None:                 # already set when the checkpoint holds a finished run
        x, v = my_md(x, v, 500)                 # any integrator, 500 steps
        s = my_cvs(x)
        frame_bias = bias.evaluate(s)[0]        # the bias that acted on this frame
        bias.deposit(s, time=run.time + 500 * dt)
        run.advance(500, time=run.time + 500 * dt, cvs=s, frame_bias=frame_bias, state={"x": x, "v": v})
    print(run.decision)

Running the same script again continues from the checkpoint, or does nothing more when it records a
decision. The checkpoint (a gridbias.checkpoint container of kind ``CHECKPOINT_KIND``) holds the bias, the
arrays given as ``state``, every frame given to ``advance`` and the decision.
"""

from __future__ import annotations

import math
import os

import numpy as np

from .bias import GridBias
from .errors import CheckpointError, ParameterError
from .stopping import Progress, Referee, StopDecision

__all__ = ["StoppingRun", "CHECKPOINT_KIND"]

#: The ``kind`` of the checkpoints a StoppingRun writes.
CHECKPOINT_KIND = "gridbias.core-run"
_VERSION = 1


class StoppingRun:
    """Step bookkeeping, checkpoints and stop rules for an MD loop written in Python.

    Parameters
    ----------
    bias : GridBias
        The bias the loop deposits on (a walkers' shared bias too: then every walker makes its own
        StoppingRun, with its own checkpoint path, and all stop together).
    rules : StopRule
        From :mod:`gridbias.stopping`, combined with ``|`` and ``&``.
    checkpoint : str or os.PathLike
        Where the run is saved. If the file exists, the run continues from it: the bias is loaded into
        ``bias`` (in place) and ``state``, ``step`` and ``time`` are restored. A decision recorded there
        stands (``decision`` is set and the loop does nothing more) when the same rule is among
        ``rules``; a run stopped by a time budget, or by a rule since changed, continues.
    checkpoint_every : int, keyword-only, optional
        Steps between checkpoints (besides the final one).

    Attributes
    ----------
    step : int
    time : float, ps
    state : dict of str to ndarray, or None
        The arrays saved with the last checkpoint (None on a fresh start).
    decision : StopDecision or None
        Set once a rule holds (or read from a checkpoint of a finished run).
    """

    def __init__(self, bias, rules, *, checkpoint, checkpoint_every: int | None = None):
        from .checkpoint import CheckpointLock

        if not isinstance(bias, GridBias):
            raise ParameterError(f"bias must be a gridbias.GridBias, got {type(bias).__name__}")
        self.bias = bias
        self.referee = Referee(rules, bias)
        self.path = os.fspath(checkpoint)
        if checkpoint_every is not None and (isinstance(checkpoint_every, bool) or not isinstance(
                checkpoint_every, (int, np.integer)) or checkpoint_every < 1):
            raise ParameterError(f"checkpoint_every must be an integer number of steps >= 1, got "
                                 f"{checkpoint_every!r}")
        self.checkpoint_every = checkpoint_every
        self.step, self.time, self.state, self.decision = 0, 0.0, None, None
        self._times, self._cvs, self._frame_bias = [], [], []
        self._lock = CheckpointLock(self.path).acquire()
        if os.path.exists(self.path):
            self._restore()

    # -- checkpoints --------------------------------------------------------------------------------
    def _restore(self):
        from .checkpoint import read_checkpoint

        meta, arrays = read_checkpoint(self.path, kind=CHECKPOINT_KIND)
        try:
            bias_state = {k[5:]: v for k, v in arrays.items() if k.startswith("bias.")}
            restored = getattr(self.bias, "restored", None)
            loaded = (restored(meta["bias"], bias_state) if callable(restored)
                      else GridBias.from_state(meta["bias"], bias_state))
            step, time = int(meta["step"]), float(meta["time_ps"])
            stop = None if meta.get("stop") is None else StopDecision.from_dict(meta["stop"])
            times, cvs, frame_bias = (arrays["frames.times"], arrays["frames.cvs"], arrays["frames.bias"])
        except CheckpointError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise CheckpointError(f"{self.path}: run checkpoint is incomplete or malformed ({exc})") from exc
        diff = self.bias.describe_difference(loaded)
        if diff:
            raise CheckpointError(f"{self.path}: the bias {diff} (this run vs checkpoint)")
        if cvs.ndim != 2 or cvs.shape[0] != times.shape[0] or frame_bias.shape != times.shape:
            raise CheckpointError(f"{self.path}: the frames' arrays do not fit together ({times.shape}, "
                                  f"{cvs.shape}, {frame_bias.shape})")
        self.bias._adopt(loaded)
        self.step, self.time = step, time
        self.decision = stop if self.referee.confirms(stop) else None
        self.state = {k[6:]: v for k, v in arrays.items() if k.startswith("state.")}
        self._times, self._cvs, self._frame_bias = list(times), list(cvs), list(frame_bias)

    def save(self) -> None:
        """Write the checkpoint now (atomically): bias, state, frames and the decision if there is one."""
        from .checkpoint import write_checkpoint

        bias_meta, bias_arrays = self.bias.to_state()
        meta = {"version": _VERSION, "bias": bias_meta, "step": self.step, "time_ps": self.time,
                "stop": None if self.decision is None else self.decision.to_dict()}
        arrays = {f"bias.{k}": np.ascontiguousarray(v) for k, v in bias_arrays.items()}
        for name, value in (self.state or {}).items():
            arrays[f"state.{name}"] = np.ascontiguousarray(value)
        d = self.bias.ndim
        arrays["frames.times"] = np.array(self._times, dtype=float)
        arrays["frames.cvs"] = np.array(self._cvs, dtype=float).reshape(-1, d)
        arrays["frames.bias"] = np.array(self._frame_bias, dtype=float)
        write_checkpoint(self.path, meta, arrays, kind=CHECKPOINT_KIND)

    def close(self) -> None:
        """Release the checkpoint's lock."""
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    # -- the loop -----------------------------------------------------------------------------------
    def _frames(self):
        if not self._times:
            return None
        times = np.array(self._times)
        frame_bias = np.array(self._frame_bias)
        return times, np.array(self._cvs).reshape(times.size, -1), (
            None if np.isnan(frame_bias).any() else frame_bias)

    def stretch(self, default: int) -> int:
        """How many steps to run before the next ``advance`` (at most ``default``; rules may ask fewer).

        Optional: a loop that always advances by a fixed number of steps needs it only for time budgets
        that should end mid-stretch. Collective with walkers.
        """
        progress = Progress(self.step, self.time, self.bias, self.referee.elapsed(),
                            self.referee.seconds_per_step(self.step))
        return self.referee.stretch(progress, default)

    def advance(self, n_steps: int, *, time: float, cvs=None, frame_bias: float | None = None,
                state: dict | None = None) -> StopDecision | None:
        """Record ``n_steps`` steps done, ask the rules, and write the checkpoints that are due.

        Parameters
        ----------
        n_steps : int
            Steps done since the last call.
        time : float, ps
            Simulated time now.
        cvs : (d,) float, keyword-only, optional
            The CVs now (a frame for transitions, basins and the cross-check).
        frame_bias : float, kJ/mol, keyword-only, optional
            The bias that acted on this frame (before the deposit at this step, if any).
        state : dict of str to ndarray, keyword-only, optional
            Whatever the loop needs to continue (positions, velocities, random state as arrays); saved
            with every checkpoint.

        Returns
        -------
        StopDecision or None
            The decision once a rule holds; the final checkpoint is then written. Collective with walkers.
        """
        if self.decision is not None:
            raise ParameterError(f"the run has already stopped ({self.decision}); nothing more to advance")
        if isinstance(n_steps, bool) or not isinstance(n_steps, (int, np.integer)) or n_steps < 1:
            raise ParameterError(f"n_steps must be an integer >= 1, got {n_steps!r}")
        time = float(time)
        if not math.isfinite(time):
            raise ParameterError(f"time must be a finite number of ps, got {time!r}")
        if cvs is not None:
            s = np.asarray(cvs, dtype=float).reshape(-1)
            if s.shape != (self.bias.ndim,) or not np.isfinite(s).all():
                raise ParameterError(f"cvs must be {self.bias.ndim} finite values, got {cvs!r}")
            self._times.append(time)
            self._cvs.append(s)
            self._frame_bias.append(np.nan if frame_bias is None else float(frame_bias))
        if state is not None:
            if not isinstance(state, dict):
                raise ParameterError(f"state must be a dict of name -> array, got {type(state).__name__}")
            self.state = state
        before = self.step
        self.step += int(n_steps)
        self.time = time
        progress = Progress(self.step, self.time, self.bias, self.referee.elapsed(),
                            self.referee.seconds_per_step(self.step), self._frames)
        self.decision = self.referee.decide(progress)
        self.referee.restart_clock(self.step)
        due = (self.checkpoint_every is not None
               and self.step // self.checkpoint_every > before // self.checkpoint_every)
        if self.decision is not None or due:
            self.save()
        if self.decision is not None:
            self.close()
        return self.decision
