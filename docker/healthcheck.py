"""The container's health check: the service answers /healthz on its own port."""

import os
import sys
import urllib.request

port = os.environ.get("PHASEWARD_PORT", "8470")
try:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=3) as answer:
        sys.exit(0 if answer.status == 200 else 1)
except OSError:
    sys.exit(1)
