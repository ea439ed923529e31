"""Monitor: the held-out window and its scoring, the rollback and restart rules, and change detection.

May import ``models`` and ``service.config``; nothing else in ``service``.
"""

__all__: list[str] = []
