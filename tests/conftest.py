"""Hooks for the whole test session: the order tests run in.

Knows nothing about what any test checks."""

from __future__ import annotations

from pathlib import Path

import pytest

_WEB = Path(__file__).parent / "web"


def pytest_collection_modifyitems(
    session: pytest.Session, config: pytest.Config, items: list[pytest.Item]
) -> None:
    """Browser tests run last, whatever order the paths were given in.

    Playwright's sync API keeps an asyncio loop running in the main thread for as long as
    the session-wide browser lives, so a later test that calls ``asyncio.run`` (the CLI's
    feeders do) would fail with "cannot be called from a running event loop"."""
    items.sort(key=lambda item: Path(str(item.path)).is_relative_to(_WEB))
