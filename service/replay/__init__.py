"""Replay: the offline runner (``runner``), the report (``report``), progress lines (``progress``),
the demo scenario (``scenario``, ``demo``) and feeds built from open datasets (``open_feeds``).

May import everything in ``service`` but ``service.http``.
"""

__all__: list[str] = []
