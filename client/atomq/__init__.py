"""atomq: submit atomistic calculations to your lab's queue and get ASE objects back.

Units throughout are ASE's: Angstrom, eV, eV/Angstrom, eV/Angstrom^3, K; MD
time steps are given in fs. Simulated numbers need validation before any
engineering or safety decision.
"""

from atomq.batches import BatchCreate, BatchPublic
from atomq.client import Batch, Client, Job
from atomq.comparisons import ComparisonCreate, ComparisonPublic
from atomq.errors import (
    AtomqError,
    AuthenticationFailed,
    ConfigurationError,
    InvalidRequest,
    JobFailed,
    NotFound,
    ServerError,
)
from atomq.jobs import CalculatorPublic, JobCreate, JobPage, JobPublic, JobState, WorkerPublic
from atomq.results import (
    ArtifactRecord,
    MDResult,
    NEBResult,
    Provenance,
    RelaxResult,
    Result,
    SinglePointResult,
)
from atomq.structure import Structure, StructureError
from atomq.tasks import MD, NEB, CellRelax, JobReference, Relax, SinglePoint, TaskSpec


def __getattr__(name: str) -> str:
    # atomq.__version__ is worked out on first use (it may ask git, see atomq.version),
    # so importing atomq runs no subprocess.
    if name == "__version__":
        from atomq.version import code_identity

        return code_identity().version
    raise AttributeError(f"module 'atomq' has no attribute {name!r}")


__all__ = [
    "MD",
    "NEB",
    "ArtifactRecord",
    "AtomqError",
    "AuthenticationFailed",
    "Batch",
    "BatchCreate",
    "BatchPublic",
    "CalculatorPublic",
    "CellRelax",
    "Client",
    "ComparisonCreate",
    "ComparisonPublic",
    "ConfigurationError",
    "InvalidRequest",
    "Job",
    "JobCreate",
    "JobFailed",
    "JobPage",
    "JobPublic",
    "JobReference",
    "JobState",
    "MDResult",
    "NEBResult",
    "NotFound",
    "Provenance",
    "Relax",
    "RelaxResult",
    "Result",
    "ServerError",
    "SinglePoint",
    "SinglePointResult",
    "Structure",
    "StructureError",
    "TaskSpec",
    "WorkerPublic",
    "__version__",
]
