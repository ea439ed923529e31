"""trimtab's service side: everything that touches the outside world.

Config (``config``), the event boundary (``events``), the engine shared by the live service and
replay (``engine``), the stability monitor (``monitor``, ``holdout``, ``drift``), the journal and
recovery (``journal``, ``recovery``), ingestion (``ingest``, ``feed``), the HTTP app (``app``,
``handlers``, ``schemas``, ``errors``, ``metrics``, ``labels``), replay and reports (``replay``,
``feeds``, ``columns``, ``report``, ``replay_client``), the demo (``scenario``, ``demo``) and the
command line (``cli``). The package face stays empty on purpose: importing one part (a replay
worker, say) must not load the HTTP stack.
"""

__all__: list[str] = []
