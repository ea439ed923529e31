"""Monitor: the held-out window and its scoring (``window.py``), the rules, one named function each
(``rules.py``), river's change detectors with a state saved without pickle (``detectors.py``), and the
monitor that runs them at every check (``monitor.py``).

May import ``models``, ``service.config`` and river; nothing else in ``service``.
"""
