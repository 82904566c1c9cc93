"""What the command line shows while it works: one progress bar per stage.

A stage runs as one task (``bin``, ``detrend``, a programme's ``joint``) or
as many chunk tasks that may run in parallel worker processes (``calibrate``,
``extract``).  Every task reports to the same :class:`Progress`, which keeps one bar per stage:

* a task that is the whole stage reports ``(done, total)`` of its own steps;
* a chunk task reports ``part`` (its chunk number), the units it has done
  (exposures) and the stage's total units; the bar shows the sum over the
  parts, so parallel chunks fill one bar together.

The counts live in shared memory created before Luigi forks its worker
processes, so every process draws the same bar.  On a terminal each update
rewrites the whole line (padded to the terminal's width, so no characters of
a longer earlier line remain), and a stage's line ends when its last task
reports completion; any other message (an interruption, an error) first
closes an open line, so it always starts a line of its own.  On a pipe or a
file each stage writes a line when it starts, at most every
:attr:`Progress.interval` seconds, and when it ends.
"""

import multiprocessing
import shutil
import sys
import time

__all__ = ["Progress"]

#: Stages that can have a bar, in the order they run (a programme's joint fit last).
_STAGES = ("simulate", "calibrate", "extract", "bin", "detrend", "joint")
#: Parts (chunks) tracked per stage; chunk k counts in slot k modulo this.
_PARTS = 4096
_BAR = 24


class Progress:
    """One progress bar per stage, written to standard error.

    Call it as ``progress(stage, what, done, total, part=None)`` (see the
    module docstring); :meth:`close` ends an open line.

    Parameters
    ----------
    stream : file-like, optional
        Where to write; default ``sys.stderr``.
    interval : float, optional
        Seconds between lines when the stream is not a terminal.
    """

    def __init__(self, stream=None, *, interval=2.0):
        self.stream = stream or sys.stderr
        try:
            self.tty = bool(self.stream.isatty())
        except (AttributeError, ValueError):
            self.tty = False
        self.interval = float(interval)
        ctx = multiprocessing.get_context()
        n = len(_STAGES)
        self._lock = ctx.Lock()
        self._part_done = ctx.RawArray("d", n * _PARTS)
        self._part_used = ctx.RawArray("b", n * _PARTS)
        self._single = ctx.RawArray("d", 2 * n)        # done, total of a whole-stage task
        self._total = ctx.RawArray("d", n)             # the stage's total units
        self._state = ctx.RawArray("i", n)             # 0 not started, 1 open, 2 finished
        self._open = ctx.RawValue("i", -1)             # stage whose line is open (tty)
        self._last = {}

    # -- reporting -------------------------------------------------------------
    def __call__(self, stage, what, done, total, part=None):
        if stage not in _STAGES:
            return
        s = _STAGES.index(stage)
        with self._lock:
            if part is None:
                self._single[2 * s] = float(done)
                self._single[2 * s + 1] = float(total)
                self._total[s] = max(self._total[s], float(total))
            else:
                slot = s * _PARTS + int(part) % _PARTS
                self._part_done[slot] = float(done)
                self._part_used[slot] = 1
                self._total[s] = max(self._total[s], float(total))
            shown, whole = self._counts(s)
            finished = part is None and total > 0 and done >= total
            self._draw(s, stage, what, shown, whole, finished)

    def _counts(self, s):
        start = s * _PARTS
        used = self._part_used[start:start + _PARTS]
        if any(used):
            parts = self._part_done[start:start + _PARTS]
            done = sum(d for d, u in zip(parts, used) if u)
            # a whole-stage task that runs after its chunks (joining them) adds its steps
            return max(done, self._single[2 * s]), self._total[s]
        return self._single[2 * s], self._single[2 * s + 1]

    def _line(self, stage, what, done, total):
        total = max(total, 0.0)
        fraction = min(max(done / total, 0.0), 1.0) if total > 0 else 0.0
        filled = int(round(_BAR * fraction))
        bar = "#" * filled + "-" * (_BAR - filled)
        return f"{stage:>9} [{bar}] {int(done):>6}/{int(total):<6} {what}"

    def _draw(self, s, stage, what, done, total, finished):
        line = self._line(stage, what, done, total)
        if self.tty:
            width = max(shutil.get_terminal_size((80, 24)).columns - 1, 20)
            text = line[:width].ljust(width)
            if self._open.value not in (-1, s):
                self.stream.write("\n")          # another stage's line is still open
            self.stream.write("\r" + text)
            if finished:
                self.stream.write("\n")
                self._open.value = -1
                self._state[s] = 2
            else:
                self._open.value = s
                self._state[s] = 1
        else:
            now = time.monotonic()
            first = self._state[s] == 0
            if not (first or finished or now - self._last.get(s, -1e9) >= self.interval):
                return
            self._last[s] = now
            self._state[s] = 2 if finished else 1
            self.stream.write(line + "\n")
        self.stream.flush()

    def close(self):
        """End an open progress line, so that the next message starts a line of its own."""
        with self._lock:
            if self.tty and self._open.value != -1:
                self.stream.write("\n")
                self.stream.flush()
                self._open.value = -1
