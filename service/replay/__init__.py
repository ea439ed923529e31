"""Replay: the offline runner (``runner``), the report (``report``, its figures as inline SVG by ``figures``), progress lines (``progress``),
the demo scenario (``scenario``, ``demo``), feeds built from open datasets (``open_feeds``) and
config sweeps on Dask (``sweep``: its grid in ``sweep_grid``, its runs in ``sweep_dask``, its page
in ``sweep_report``).

May import everything in ``service`` but ``service.http``.
"""

__all__: list[str] = []
