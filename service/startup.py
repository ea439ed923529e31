"""Start-up of the ingestion side: kernels, storage checks, the checkpoint and the journal replay.

:func:`recover` runs once, before :class:`service.ingest.Ingestor` starts its stages, in this order
(each step is described in :mod:`service.storage.recovery`):

1. compile (first run) or load the compiled kernels, so the first write after ``/readyz`` runs at
   full speed instead of waiting seconds for the compiler;
2. the service incidents kept in the journal, then :func:`check_storage`;
3. :func:`load_state`: the newest usable checkpoint (or an empty engine for a whole journal);
4. the journal rows after that position, re-applied on the learner thread in journal order, in
   pieces of about :data:`REPLAY_ROWS` positions (a row of an NDJSON body's lines stands for one
   position per line); a gap in the positions refuses the start.

It uses the ingestor's threads, lock and metrics but never imports :mod:`service.ingest`.
"""

from __future__ import annotations

import time

from service.storage.journal import first_position
from service.storage.recovery import RecoveryRefused, check_storage, load_state, replay_rows
from service.kernels import build_later
from service.warmup import is_cached, kernels_of, warm_parallel

__all__ = ["REPLAY_ROWS", "recover"]

#: journal positions (events, notes, rollbacks) read and re-applied at a time during recovery
REPLAY_ROWS = 5000


async def recover(ing) -> tuple[int, int, int]:
    """Bring ``ing`` (an :class:`service.ingest.Ingestor`) to the state of its journal.

    Returns ``(checkpoint position, rows re-applied, next journal position)``; progress is kept in
    ``ing.recovery``. Raises :class:`RecoveryRefused` when the storage is damaged or the
    acknowledged history cannot be rebuilt (the service then stays not ready, with an incident).
    """
    t0 = time.perf_counter()
    kernels = kernels_of([ing.config])
    ing.recovery["state"] = "loading" if is_cached(("learn", "read"), kernels) else "compiling"
    await ing.learn(warm_parallel, [["learn"], ["read"]], kernels)
    ing.recovery["compile_seconds"] = round(time.perf_counter() - t0, 3)
    build_later()  # the ahead-of-time kernels for the next start, if they were missing
    ing.recovery["state"] = "recovering"
    ing.incidents.extend(await ing.db(ing.journal.incidents))
    await check_storage(ing)
    engine, pos = await load_state(ing)
    with ing.lock:
        ing.engine, ing.applied_seq = engine, pos  # the checkpoint's position is where the engine is
        ing.set_view()
    ing.checkpoint_seq = pos
    ing.recovery["checkpoint"] = pos
    replayed, after = 0, pos
    while True:
        rows = await ing.db(ing.journal.rows_after, after, REPLAY_ROWS)
        if not rows:
            break
        if first_position(rows[0]) != after + 1:
            raise RecoveryRefused(f"the journal continues at position {first_position(rows[0])} after the state "
                                  f"at position {after}: rows are missing or a row spans that position")
        await ing.learn(replay_rows, ing, rows)
        replayed += rows[-1][0] - after
        ing.metrics.replayed.inc(rows[-1][0] - after)
        after = rows[-1][0]
        ing.recovery["replayed"] = replayed
    next_seq = max(after, await ing.db(ing.journal.last_seq)) + 1
    ing.recovery.update(state="ready", seconds=round(time.perf_counter() - t0, 3))
    return pos, replayed, next_seq
