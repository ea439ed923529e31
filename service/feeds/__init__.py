"""Feeds: file readers for NDJSON, CSV and Parquet (``files``), the columnar parse (``columns``,
``ndjson_columns``, ``ndjson_direct``), the Redis stream consumer (``redis_stream``), and replay of a recorded feed into a
running service (``into_service``).

May import ``models``, ``service.config``, ``service.errors``, ``service.events``, ``service.idhash``,
``service.engine`` and ``service.ingest``; never HTTP, storage, monitor or replay.
"""

__all__: list[str] = []
