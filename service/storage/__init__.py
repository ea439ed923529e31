"""Storage: the SQLite journal (``journal``) with its whole-history deduplication index (``seen``, in sorted runs),
the checkpoint format (``checkpoint``, described in ``docs/checkpoint-format.md``), recovery at start
(``recovery``), storage faults (``health`` names them and finds a damaged write-ahead log, ``guard``
refuses writes until the storage recovers), the data-dir lock (``dirlock``), and the store of
features remembered for a later label (``labels``).

May import ``models``, ``service.config``, ``service.errors`` and ``service.engine``'s state; never
HTTP, feeds, monitor internals or replay.
"""

__all__: list[str] = []
