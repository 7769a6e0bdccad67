import os
import sys

try:  # the package may be installed (pip install -e .) or not
    import leastwise.drift  # noqa: F401
except ImportError:  # pragma: no cover - source checkout without install
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "..", "service"))
