from __future__ import annotations

from pathlib import Path

import pytest

pytest_plugins = ["tests.kafka_broker", "tests.kafka_tls"]

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="session")
def repo_root() -> Path:
    return REPO
