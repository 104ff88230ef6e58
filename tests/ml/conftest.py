"""Every test here needs the ml/xtb extras and takes seconds to load a model: marked
`ml`, so `pytest -m 'not ml'` leaves them out of a quick local run (CI runs them)."""

from __future__ import annotations

import pytest


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    for item in items:
        if "tests/ml/" in str(item.path):
            item.add_marker(pytest.mark.ml)
