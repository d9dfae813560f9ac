"""Prefect settings that must be in place before Prefect is imported.

The temporary API server takes about 30 s to start on a fresh machine, longer than Prefect's
default start-up timeout; analytics would try to reach the network; Prefect's log stream would
bury the one-line-per-stage console. Values already set in the environment win.
"""

from __future__ import annotations

import os
from pathlib import Path

DEFAULTS = {
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "180",
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "DO_NOT_TRACK": "1",
    "PREFECT_LOGGING_LEVEL": "WARNING",
    "PREFECT_LOGGING_TO_API_ENABLED": "false",
    "PREFECT_UI_ENABLED": "false",
}


def configure(verbose: bool = False) -> None:
    for name, value in DEFAULTS.items():
        os.environ.setdefault(name, value)
    if verbose:
        os.environ["PREFECT_LOGGING_LEVEL"] = "INFO"
    # Project-local Prefect home (its database and temporary server state), unless set.
    os.environ.setdefault("PREFECT_HOME", str(Path.cwd() / ".prefect"))
