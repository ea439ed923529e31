"""Storage: the SQLite journal and checkpoints (``journal``), recovery from them (``recovery``), and
the store of features remembered for a later label (``labels``).

May import ``models``, ``service.config``, ``service.errors`` and ``service.engine``'s state; never
HTTP, feeds, monitor internals or replay.
"""

__all__: list[str] = []
