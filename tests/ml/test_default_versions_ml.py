"""On a fresh install a bare `sevennet-0` means the checkpoint the README calls current,
whatever order the shipped checkpoints are registered in."""

from __future__ import annotations

from pathlib import Path

from sqlmodel import Session

from atomq_service.db import make_engine
from atomq_service.registry import resolve, seed_defaults
from atomq_service.schema import prepare_schema
from atomq_workers.main import register_shipped


def test_bare_sevennet_0_pins_the_july_2024_checkpoint(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'fresh.db'}")
    prepare_schema(engine)
    seed_defaults(engine)
    added = register_shipped(engine)
    assert {"sevennet-0@2024-07-11", "sevennet-0@2024-05-22"} <= set(added)
    with Session(engine) as session:
        assert resolve(session, "sevennet-0").ref == "sevennet-0@2024-07-11"
        assert resolve(session, "chgnet").ref == "chgnet@0.3.0"
    engine.dispose()
