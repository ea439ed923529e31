"""Progress of replay runs on stderr: a bar on a terminal, periodic lines otherwise.

Nothing is shown for a run that ends within a second. On a terminal one line is redrawn in place
(``guarded [#####.....] 52% 61,234 ev  180,511 ev/s  ETA 0:00:03``, runs side by side separated by
``|``); when stderr is not a terminal a plain line per run is printed every ``every`` seconds, so
logs stay readable. ``mode="off"`` shows nothing.

The rate and the ETA count from each run's first event, not from the start of the command: the
seconds spent before it (compiling the kernels on a first run, opening the feed) say nothing about
the pace of the rest. While a ``note`` is set (say, "compiling the learning kernels (first run
only)"), it is shown instead of the counts.
"""

from __future__ import annotations

import sys
import threading
import time

__all__ = ["Progress", "progress_mode"]

_WIDTH = 20


def progress_mode(no_progress: bool, stream=None) -> str:
    """``"off"`` with ``--no-progress``, ``"bar"`` on a terminal, else ``"lines"``."""
    stream = sys.stderr if stream is None else stream
    if no_progress:
        return "off"
    return "bar" if getattr(stream, "isatty", lambda: False)() else "lines"


def _clock(seconds: float) -> str:
    s = int(max(seconds, 0.0) + 0.5)
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


class Progress:
    """Draws the progress of named runs from a ``state()`` callable.

    Parameters
    ----------
    names
        The runs, in display order.
    state
        Returns ``[(events, fraction_done, first), ...]`` in the order of ``names``, where ``first``
        is the :func:`time.monotonic` of the run's first event (0 before it; the clock is shared by
        processes, so a run in another process can stamp it); a pair ``(events, fraction_done)``
        counts from the start of the progress display instead. Called from a background thread
        every ``interval`` seconds.
    mode
        ``"bar"``, ``"lines"`` or ``"off"`` (see :func:`progress_mode`).
    note
        Returns what is being done before the runs start (shown instead of the counts), or ``None``.
    """

    def __init__(self, names, state, mode: str, *, stream=None, interval: float = 0.25, every: float = 5.0,
                 delay: float = 1.0, note=None) -> None:
        self.names = list(names)
        self.state = state
        self.note = note if note is not None else (lambda: None)
        self.mode = mode
        self.stream = sys.stderr if stream is None else stream
        self.interval, self.every, self.delay = interval, every, delay
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._start = 0.0
        self._drawn = False
        self._last_line = 0.0

    def __enter__(self) -> Progress:
        self._start = time.monotonic()
        self._last_line = self._start
        if self.mode != "off":
            self._thread = threading.Thread(target=self._loop, name="trimtab-progress", daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        if self._drawn and self.mode == "bar":
            self._draw(final=True)
            self.stream.write("\n")
            self.stream.flush()

    def _loop(self) -> None:
        while not self._stop.wait(self.interval):
            now = time.monotonic()
            if now - self._start < self.delay:
                continue
            if self.mode == "bar":
                self._draw()
            elif now - self._last_line >= self.every:
                self._last_line = now
                self._lines()

    def _parts(self) -> list[tuple]:
        """``(name, events, done, rate, eta)`` per run; ``rate`` is ``None`` before the first event."""
        now = time.monotonic()
        parts = []
        for name, st in zip(self.names, self.state()):
            events, done = int(st[0]), st[1]
            first = st[2] if len(st) > 2 else self._start
            if events <= 0 or first <= 0:
                parts.append((name, events, done, None, float("nan")))
                continue
            elapsed = max(now - first, 1e-9)
            eta = elapsed * (1.0 - done) / done if done > 0 else float("nan")
            parts.append((name, events, done, events / elapsed, eta))
        return parts

    def _draw(self, final: bool = False) -> None:
        note = None if final else self.note()
        if note:
            self.stream.write("\r" + " | ".join(f"{name}: {note}" for name in self.names) + "\x1b[K")
            self.stream.flush()
            self._drawn = True
            return
        cells = []
        for name, events, done, rate, eta in self._parts():
            if rate is None and not final:
                cells.append(f"{name}: waiting for the first event")
                continue
            rate = rate or 0.0
            fill = int(round(_WIDTH * min(max(done, 0.0), 1.0)))
            eta_text = "done" if final or done >= 1.0 else (f"ETA {_clock(eta)}" if eta == eta else "ETA ?")
            cells.append(f"{name} [{'#' * fill}{'.' * (_WIDTH - fill)}] {done:4.0%} {events:,} ev "
                         f"{rate:,.0f} ev/s {eta_text}")
        self.stream.write("\r" + " | ".join(cells) + "\x1b[K")
        self.stream.flush()
        self._drawn = True

    def _lines(self) -> None:
        note = self.note()
        for name, events, done, rate, eta in self._parts():
            if note or rate is None:
                self.stream.write(f"trimtab replay: {name}: {note or 'waiting for the first event'}\n")
                continue
            eta_text = _clock(eta) if eta == eta else "?"
            self.stream.write(f"trimtab replay: {name}: {events:,} events ({done:.0%}), {rate:,.0f} events/s, "
                              f"ETA {eta_text}\n")
        self.stream.flush()
