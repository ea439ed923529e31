"""Test-session set-up shared by every test.

Subprocesses that the tests start (``python -m service.cli serve``, replay workers) must run the code
of this checkout, not whatever copy of trimtab is installed: the checkout goes first on their
``PYTHONPATH``.
"""

import os
from pathlib import Path

_ROOT = str(Path(__file__).resolve().parents[1])
os.environ["PYTHONPATH"] = os.pathsep.join([_ROOT, *filter(None, [os.environ.get("PYTHONPATH")])])
# numba's JIT for every test unless a test asks otherwise: tests must not depend on (or start) the
# ahead-of-time build in the user's cache folder; tests/models/test_native.py builds its own
os.environ.setdefault("TRIMTAB_KERNELS", "jit")
