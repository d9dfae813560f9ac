"""Every test under tests/integration/ runs whole months, a flow or a killed process: all ``slow``
(``make test-fast`` leaves them out; ``make test`` and CI run them)."""

from __future__ import annotations

from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    for item in items:
        if HERE in Path(str(item.path)).resolve().parents:
            item.add_marker(pytest.mark.slow)
