"""The painter: the process that draws a replay's report page, started as the replay starts.

``trimtab replay`` starts a :class:`Painter` before it imports its own learning code: the painter's
interpreter loads matplotlib and readies a figure (:func:`service.replay.figures.prepare`) while the
replay imports and learns, so on two cores that start-up costs little wall time. When the runs end,
the replay sends the page's data (:meth:`Painter.send`: the traces already thinned, so little
crosses), writes its other outputs while the page is drawn, then waits for the page
(:meth:`Painter.wait`).

The replay process keeps its memory (numba, its LLVM, the readers) without the plotting stack's,
and the painter never imports the learning code. This module imports only the standard library, so
starting a painter costs the replay nothing but the process's spawn.

Run as ``python -m service.replay.painter`` it is the painter's side: load the plotting stack, then
draw a page from a pickled ``(out, summary, plots, notes, caution)`` read on stdin (nothing on stdin:
exit quietly).
"""

from __future__ import annotations

import os
import pickle
import sys
from pathlib import Path

__all__ = ["Painter", "ReportFailed"]


class ReportFailed(Exception):
    """The page could not be drawn (the run's other outputs are not affected); ``str()`` says why."""


class Painter:
    """A painter process, started now. Use as a context manager: a painter that was never asked to draw
    is stopped on exit.

    ``runs`` is the number of runs the page will show (the painter readies that many figures ahead).
    """

    def __init__(self, runs: int = 1) -> None:
        import subprocess  # here: a replay without a report imports this module for ReportFailed only
        import tempfile

        root = str(Path(__file__).resolve().parents[2])
        env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [root, os.environ.get("PYTHONPATH")])))
        # stderr goes to a file, not a pipe: a chatty painter can never block on a full pipe while
        # this process is still writing the job to its stdin
        self._err = tempfile.TemporaryFile()
        self._proc = subprocess.Popen([sys.executable, "-m", "service.replay.painter", str(max(1, runs))],
                                      stdin=subprocess.PIPE, stdout=subprocess.DEVNULL, stderr=self._err, env=env)
        self._out: Path | None = None
        self._failure: str | None = None

    def send(self, out: str | Path, summary: dict, results: list[dict], notes: list[dict] | None = None,
             caution: str | None = None) -> None:
        """Hand the page's data to the painter and return at once; :meth:`wait` gives the page.

        ``results`` as for :func:`service.replay.report.write_report` (each with its ``loss`` and its
        ``trace`` or ``plot``); the traces are thinned here (:func:`~service.replay.plotdata.thin_trace`).
        """
        from service.replay.plotdata import thin_trace
        from service.replay.report import CAUTION

        plots = [{"plot": r["plot"] if "plot" in r else thin_trace(r["trace"]), "loss": r.get("loss", "squared")}
                 for r in results]
        data = pickle.dumps((str(out), summary, plots, notes, caution or CAUTION), protocol=5)
        self._out = Path(out) / "report.html"
        try:
            self._proc.stdin.write(data)
            self._proc.stdin.close()
        except OSError as exc:  # the painter is gone (it failed to start): wait() says why
            self._failure = f"the painter stopped before it was given the page ({exc.strerror or exc})"

    def wait(self) -> Path:
        """Wait for the page sent with :meth:`send`; its path. Raises :class:`ReportFailed` if it was not drawn."""
        if self._out is None:
            raise ReportFailed("nothing was sent to the painter")
        code = self._proc.wait()
        if code != 0 or self._failure:
            self._err.seek(0)
            said = self._err.read().decode(errors="replace").strip()[-2000:]
            why = "; ".join(filter(None, [self._failure, said or f"the painter exited with status {code}"]))
            raise ReportFailed(why)
        return self._out

    def draw(self, out: str | Path, summary: dict, results: list[dict], notes: list[dict] | None = None,
             caution: str | None = None) -> Path:
        """:meth:`send` then :meth:`wait`."""
        self.send(out, summary, results, notes, caution)
        return self.wait()

    def __enter__(self) -> Painter:
        return self

    def __exit__(self, *exc) -> None:
        if self._proc.poll() is None:  # never asked to draw, or left drawing: stop it
            self._proc.kill()
        if self._proc.stdin is not None and not self._proc.stdin.closed:
            try:
                self._proc.stdin.close()
            except OSError:
                pass
        self._proc.wait()
        self._err.close()


def _paint(runs: int) -> None:
    """The painter's side: load the plotting stack and ready ``runs`` figures, then draw what arrives on
    stdin (nothing: exit)."""
    from service.replay import figures
    from service.replay.report import write_report

    figures.prepare(runs)
    try:
        job = pickle.load(sys.stdin.buffer)
    except EOFError:  # the replay ended without a report (an error, or nothing to draw)
        return
    write_report(*job)
    # the page is written and closed: leave without tearing the plotting stack down (a tenth of a
    # second the replay would otherwise wait for)
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)


if __name__ == "__main__":
    _paint(int(sys.argv[1]) if len(sys.argv) > 1 else 1)
