"""Makes the client's source importable before the test modules load:
client_env (tests/client/) puts clients/python/src on sys.path."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import client.client_env  # noqa: E402,F401
