"""`atomq verify`: recompute the sha256 of every stored artifact and report any file that
no longer matches its record (disk corruption, tampering, a file gone missing)."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import Engine
from sqlmodel import Session, col, select

from atomq_service.models import Artifact


@dataclass(frozen=True)
class ArtifactProblem:
    artifact_id: int
    job_id: int
    name: str
    problem: str


def verify_artifacts(engine: Engine, store: Path) -> tuple[int, list[ArtifactProblem]]:
    """(artifacts checked, problems found). Reads every file once, in blocks."""
    with Session(engine) as session:
        artifacts = session.exec(select(Artifact).order_by(col(Artifact.id))).all()
    problems = []
    for artifact in artifacts:
        assert artifact.id is not None
        path = store / artifact.path
        found = None
        if not path.is_file():
            found = f"file {path} is missing"
        else:
            digest = hashlib.sha256()
            with path.open("rb") as handle:
                for block in iter(lambda: handle.read(1 << 20), b""):
                    digest.update(block)
            if digest.hexdigest() != artifact.sha256:
                found = (
                    f"sha256 is {digest.hexdigest()}, recorded {artifact.sha256} "
                    f"({path.stat().st_size} bytes now, {artifact.size} recorded)"
                )
        if found:
            problems.append(ArtifactProblem(artifact.id, artifact.job_id, artifact.name, found))
    return len(artifacts), problems
