"""What ``bayeslong run`` shows while it compiles and samples: one status per model on stderr.

:class:`ProgressReporter` receives the :class:`~bayeslong.infer.progress.SamplingProgress`
reports of every fit (from this process, or from worker processes through a queue) and
the runner's one-line messages, and writes them to a stream:

- on a terminal, one status line rewritten in place (carriage return): per model what it
  is doing, the iterations done per chain and the time left at the rate so far;
- otherwise (a file, a pipe, a CI log), plain lines without control characters: one when
  a model starts compiling, one each time its share done passes another tenth or
  :attr:`ProgressReporter.every_seconds` pass without a line, and one when it is done.
"""

from __future__ import annotations

import contextlib
import shutil
import sys
import threading
import time
from typing import Callable

from bayeslong.infer.progress import SamplingProgress

__all__ = ["ProgressReporter", "QueueForwarder", "describe"]


def _duration(seconds: float) -> str:
    if seconds < 60:
        return f"{max(1, round(seconds))} s"
    minutes, sec = divmod(round(seconds), 60)
    return f"{minutes} min {sec:02d} s" if minutes < 60 else f"{minutes // 60} h {minutes % 60:02d} min"


def describe(label: str, p: SamplingProgress, *, short: bool = False) -> str:
    """One model's status in words, e.g. ``alt: sampling, per chain 512 498 of 2000, 25%, about 40 s left``."""
    if p.stage == "compiling" and p.sampler == "generic":
        # sent only when numba's cache has no entry for the kernel (docs/engine.md,
        # "Compile once per machine"): the one compile on this machine
        return f"{label}: compiling the sampler" + ("" if short else " (first use on this "
                                                    "machine; about half a minute, once)")
    if p.stage == "compiling":
        return f"{label}: compiling" + ("" if short else " the model (a model structure's first "
                                        "compile takes from tens of seconds to minutes; later "
                                        "fits reuse it)")
    if p.stage == "done":
        return f"{label}: sampling done in {_duration(p.elapsed)}"
    total = max(p.total) if p.total else 0
    chains = " ".join(str(d) for d in p.done)
    left = p.seconds_left
    text = (f"{label}: sampling, iterations per chain {chains} of {total}"
            + ("" if short else " (tuning included)") + f", {100 * p.fraction:.0f}%")
    text += f", about {_duration(left)} left" if left is not None else ""
    if p.divergences:
        text += f", {p.divergences} divergent"
    return text


class ProgressReporter:
    """Write sampling progress and messages to ``stream`` (default ``sys.stderr``).

    Parameters
    ----------
    stream : file-like, optional
    tty : bool, optional
        Rewrite one status line in place; default: whether ``stream`` is a terminal.
    every_seconds : float, default 10
        Without a terminal, the longest silence while a model samples.
    prefix : str
        Put before every line.
    """

    def __init__(self, stream=None, *, tty: bool | None = None, every_seconds: float = 10.0,
                 prefix: str = "[bayeslong] ", clock: Callable[[], float] = time.monotonic):
        self.stream = stream if stream is not None else sys.stderr
        if tty is None:
            isatty = getattr(self.stream, "isatty", None)
            tty = bool(isatty()) if callable(isatty) else False
        self.tty = tty
        self.every_seconds = every_seconds
        self.prefix = prefix
        self.clock = clock
        self.active: dict[str, SamplingProgress] = {}
        self._last: dict[str, tuple[int, float]] = {}  # label -> (tenth, time) of the last line
        self._shown = 0  # width of the status line on the terminal
        self._lock = threading.Lock()

    # --- plain messages ---------------------------------------------------------------------
    def line(self, message: str) -> None:
        """Print one message line (the status line, if any, is redrawn below it)."""
        with self._lock:
            self._clear()
            self._write(self.prefix + message + "\n")
            self._draw()

    # --- sampler reports ----------------------------------------------------------------------
    def for_model(self, label: str) -> Callable[[SamplingProgress], None]:
        """The ``progressbar`` callable of :func:`bayeslong.fit` for the model ``label``."""
        return lambda p: self.update(label, p)

    def update(self, label: str, p: SamplingProgress) -> None:
        with self._lock:
            if self.tty:
                self._clear()
                if p.stage == "done":
                    self.active.pop(label, None)
                else:
                    self.active[label] = p
                self._draw()
                return
            self._plain(label, p)

    def _plain(self, label: str, p: SamplingProgress) -> None:
        now = self.clock()
        tenth = int(10 * p.fraction) if p.stage == "sampling" else -1
        last = self._last.get(label)
        if p.stage == "compiling":
            if last is not None and last[0] == -1:
                return
        elif p.stage == "sampling" and last is not None and last[0] >= 0:
            if tenth <= last[0] and now - last[1] < self.every_seconds:
                return
        if p.stage == "done":
            self._last.pop(label, None)
        else:
            self._last[label] = (tenth, now)
        self._write(self.prefix + describe(label, p) + "\n")

    # --- the terminal's status line ---------------------------------------------------------
    def _status(self) -> str:
        text = self.prefix + " | ".join(describe(k, v, short=True) for k, v in self.active.items())
        width = shutil.get_terminal_size((100, 20)).columns - 1
        return text if len(text) <= width else text[:max(0, width - 3)] + "..."

    def _draw(self) -> None:
        if self.tty and self.active:
            text = self._status()
            self._write("\r" + text)
            self._shown = len(text)

    def _clear(self) -> None:
        if self.tty and self._shown:
            self._write("\r" + " " * self._shown + "\r")
            self._shown = 0

    def close(self) -> None:
        """End the status line (a terminal's cursor goes back to a fresh line)."""
        with self._lock:
            self._clear()
            self.active.clear()

    def _write(self, text: str) -> None:
        self.stream.write(text)
        self.stream.flush()

    # --- worker processes -------------------------------------------------------------------
    @contextlib.contextmanager
    def listening(self):
        """A queue that worker processes put ``(label, SamplingProgress)`` on, read here.

        Yields the queue (a ``multiprocessing.Manager`` queue, which can be passed to a
        process pool's tasks); a thread of this process forwards its items to
        :meth:`update` until the block ends.
        """
        import multiprocessing as mp

        method = "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"
        with mp.get_context(method).Manager() as manager:
            queue = manager.Queue()

            def forward():
                while True:
                    item = queue.get()
                    if item is None:
                        return
                    self.update(*item)

            thread = threading.Thread(target=forward, name="bayeslong-progress", daemon=True)
            thread.start()
            try:
                yield queue
            finally:
                queue.put(None)
                thread.join(timeout=5)


class QueueForwarder:
    """A picklable ``progressbar`` callable that puts ``(label, report)`` on a queue."""

    def __init__(self, queue, label: str):
        self.queue, self.label = queue, label

    def __call__(self, p: SamplingProgress) -> None:
        try:
            self.queue.put((self.label, p))
        except Exception:  # the listener is gone (the run is ending): progress is optional
            pass
