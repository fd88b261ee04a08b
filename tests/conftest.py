"""Settings shared by every test run."""

from __future__ import annotations

import os

# Apps built by tests deliver no webhooks in the background; the notification tests run the
# delivery worker themselves, step by step.
os.environ.setdefault("INRUSH_NOTIFY_WORKER", "0")
