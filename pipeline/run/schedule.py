"""The scheduled monthly run: a Prefect deployment of ``monthly_surveillance`` with a cron
schedule from config/pipeline.yaml (default: the 3rd of each month at 06:00, for the previous
month), served by ``kidneysurv schedule`` against a running Prefect server.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from pipeline.core.settings import Settings

DEPLOYMENT_NAME = "monthly"
FLOW_NAME = "monthly_surveillance"


def build_deployment(settings: Settings, config_dir: Path, inbox: Path, out: Path) -> Any:
    """The deployment (not yet applied): cron and time zone from settings, absolute paths."""
    from prefect.schedules import Cron

    from pipeline.run.flows import monthly_surveillance

    s = settings.pipeline.schedule
    return monthly_surveillance.to_deployment(
        name=DEPLOYMENT_NAME,
        schedules=[Cron(s.cron, timezone=s.timezone)],
        parameters={
            "period": None,
            "config_dir": str(config_dir.resolve()),
            "inbox": str(inbox.resolve()),
            "out": str(out.resolve()),
            "demo": False,
        },  # fmt: skip
        description="kidneysurv: the previous month's surveillance run (period None = previous month).",
        tags=["kidneysurv"],
    )


def serve(settings: Settings, config_dir: Path, inbox: Path, out: Path) -> None:
    """Register the deployment and serve it until stopped (Ctrl-C pauses the schedule)."""
    from prefect import serve as prefect_serve

    prefect_serve(build_deployment(settings, config_dir, inbox, out))
