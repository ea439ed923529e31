"""trimtab's service side: everything that touches the outside world.

The folders are the architecture:

* ``http/``: app factory, handlers, schemas, metrics;
* ``storage/``: journal, checkpoints, recovery, label store;
* ``feeds/``: file readers, the columnar parse, the Redis stream, replay into a running service;
* ``monitor/``: held-out window, rules, change detection;
* ``replay/``: offline replay, report, progress, demo scenario, open-data feeds.

At the top: ``config``, ``errors``, the event boundary (``events``), id hashing (``idhash``), the
engine shared by the live service and replay (``engine``) with the baseline it scores beside the model
(``baseline``), ingestion (``ingest``) with its start-up (``startup``) and the command line
(``cli``). The package faces stay empty on purpose: importing one part (a replay worker, say) must not
load the HTTP stack.
"""

__all__: list[str] = []
