"""HTTP: the app factory (``app``), route handlers (``handlers``), request and response schemas and
the OpenAPI document (``schemas``), and the Prometheus metrics (``metrics``).

May import everything in ``service``; nothing in ``service`` imports it but the CLI.
"""

__all__: list[str] = []
