"""Progress while the kernels compile and after: what is being done, and an ETA from the first event."""

from __future__ import annotations

import io
import time

from service.replay.progress import Progress
from service.warmup import COMPILING


def _run(state, note=None, seconds: float = 0.3) -> str:
    stream = io.StringIO()
    with Progress(["guarded"], state, "lines", stream=stream, interval=0.01, every=0.02, delay=0.05, note=note):
        time.sleep(seconds)
    return stream.getvalue()


def test_progress_says_it_is_compiling_instead_of_zero_events():
    """While the note is set, the lines say what is done (not "0 events, 0 events/s, ETA ?"); before
    the first event they say that they wait for it."""
    text = _run(lambda: [(0, 0.0, 0.0)], note=lambda: COMPILING)
    assert "guarded: compiling the learning kernels (first run only)" in text, text
    assert "events/s" not in text and "ETA" not in text
    text = _run(lambda: [(0, 0.0, 0.0)])
    assert "waiting for the first event" in text and "ETA" not in text, text


def test_rate_and_eta_count_from_the_first_event():
    """A run that started its first event 10 s ago and is half done: 500 events/s and 10 s left,
    however long the command ran before (the arithmetic a reader checks by hand: 5,000 / 10 and
    10 x (1 - 0.5) / 0.5)."""
    first = time.monotonic() - 10.0
    text = _run(lambda: [(5000, 0.5, first)])
    last = text.strip().splitlines()[-1]
    assert "5,000 events (50%)" in last, last
    rate = int(last.split("(50%), ")[1].split(" events/s")[0].replace(",", ""))
    assert 470 <= rate <= 500, last  # 5,000 / (10 s plus the moments the display itself took)
    # counted from the start of the display instead, the ETA would be a fraction of a second
    assert last.endswith(("ETA 0:00:10", "ETA 0:00:11")), last
