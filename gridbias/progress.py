"""Progress on a terminal or in a log: a one-line display, a counter for long analyses, durations."""

from __future__ import annotations

import math
import sys
import time

__all__ = ["ProgressLine", "format_duration", "REBUILDING", "REWEIGHTING"]

#: What the long analyses say they are doing (with ``ProgressLine.counter(..., "moments")``).
REBUILDING = "free-energy differences along the run (the bias rebuilt at each moment)"
REWEIGHTING = "reweighting the frames (the bias as it was at each moment)"


class ProgressLine:
    """A one-line progress display on a stream.

    On a terminal the line is rewritten in place (at most every ``interval`` seconds). Elsewhere (a log
    file, a pipe) a full line is written at most every ``plain_interval`` seconds, the first one only after
    that long, so short tasks leave no trace in logs.

    Parameters
    ----------
    stream : text stream, default sys.stderr
    interval, plain_interval : float, s
    """

    def __init__(self, stream=None, *, interval: float = 0.25, plain_interval: float = 15.0):
        self.stream = sys.stderr if stream is None else stream
        self.live = bool(getattr(self.stream, "isatty", lambda: False)())
        self.interval = interval if self.live else plain_interval
        self._last = -math.inf if self.live else time.monotonic()
        self._width = 0
        self._shown = False

    def update(self, text: str, *, force: bool = False) -> None:
        """Show ``text`` if the last update is older than the interval (or ``force``)."""
        now = time.monotonic()
        if not force and now - self._last < self.interval:
            return
        self._last = now
        self._shown = True
        if self.live:
            self.stream.write("\r" + text + " " * max(self._width - len(text), 0))
            self._width = len(text)
        else:
            self.stream.write(text + "\n")
        self.stream.flush()

    def finish(self, text: str | None = None) -> None:
        """End the display: show ``text`` if given, or if anything was shown before; end the line."""
        if text is not None and (self._shown or self.live):
            self.update(text, force=True)
        if self.live and self._width:
            self.stream.write("\n")
            self.stream.flush()
        self._width = 0
        self._shown = False

    def counter(self, what: str, unit: str = ""):
        """A ``progress(done, total)`` callback for the analysis functions: "what: 30 of 40 unit"."""
        def report(done, total):
            text = f"{what}: {done:,} of {total:,}" + (f" {unit}" if unit else "")
            if done < total:
                self.update(text)
            elif self._shown:
                self.finish(text)
        return report


def format_duration(seconds: float) -> str:
    """'42 s', '3 min 05 s', '1 h 02 min'."""
    if not math.isfinite(seconds):
        return "?"
    seconds = max(0, int(round(seconds)))
    if seconds < 60:
        return f"{seconds} s"
    if seconds < 3600:
        return f"{seconds // 60} min {seconds % 60:02d} s"
    return f"{seconds // 3600} h {seconds % 3600 // 60:02d} min"
