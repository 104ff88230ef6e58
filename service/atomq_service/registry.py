"""The calculator registry: immutable `name@version` records, and the default set.

The service only reads records; it never imports backend code. Elements covered
are stored in the record so the service can refuse uncovered elements itself.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from ase.calculators.emt import parameters as emt_parameters
from ase.data import chemical_symbols
from sqlalchemy import Engine, func
from sqlmodel import Session, col, select

from atomq.admin import DefaultVersionPublic
from atomq.jobs import CalculatorPublic
from atomq_service.db import transaction
from atomq_service.errors import ApiError
from atomq_service.models import Calculator, DefaultVersion, Job, User
from atomq_service.presence import live_workers

ALL_ELEMENTS: list[str] = list(chemical_symbols[1:119])  # H .. Og

# Argon Lennard-Jones parameters, sigma = 3.405 Angstrom, epsilon/kB = 119.8 K
# (the classic fit to liquid argon; values recalled from memory, widely tabulated).
ARGON_SIGMA = 3.405
ARGON_EPSILON = 119.8 * 8.617333262e-5  # eV
# The cutoff is 8 sigma: the neglected tail beyond rc plus the shift ASE applies so the
# pair energy is zero at rc together cost about 0.4 % of the fcc cohesive energy, so
# the seeded model stays within 1 % of the full lattice sum (checked in the tests).
ARGON_RC = 8.0 * ARGON_SIGMA

DEFAULT_CALCULATORS: list[dict[str, Any]] = [
    {
        "name": "emt",
        "version": "1",
        "backend": "emt",
        "parameters": {},
        "elements": sorted(emt_parameters),
        "notes": "ASE's effective medium theory (Jacobsen et al.); a fast toy model for "
        "Al, Ni, Cu, Pd, Ag, Pt, Au and their alloys, not quantitatively accurate.",
    },
    {
        "name": "lj-argon",
        "version": "1",
        "backend": "lennard_jones",
        "parameters": {
            "sigma": ARGON_SIGMA,
            "epsilon": ARGON_EPSILON,
            "rc": ARGON_RC,
            "smooth": False,
        },
        "elements": ["Ar"],
        "notes": "Lennard-Jones argon, sigma 3.405 A, epsilon/kB 119.8 K, cutoff 8 sigma.",
    },
    {
        "name": "morse-cu",
        "version": "1",
        "backend": "morse",
        # Girifalco & Weizer (1959) Morse fit for Cu: D = 0.3429 eV, alpha = 1.3588 1/A,
        # r0 = 2.866 A (recalled from memory); ASE writes exp(rho0 (1 - r/r0)), so
        # rho0 = alpha * r0.
        "parameters": {
            "epsilon": 0.3429,
            "r0": 2.866,
            "rho0": 1.3588 * 2.866,
            "rcut1": 1.9 * 2.866,
            "rcut2": 2.7 * 2.866,
        },
        "elements": ["Cu"],
        "notes": "Pairwise Morse potential for copper (Girifalco & Weizer 1959 parameters).",
    },
]


def seed_defaults(engine: Engine) -> None:
    """Register the default calculators that are not there yet (idempotent)."""
    with transaction(engine) as session:
        for record in DEFAULT_CALCULATORS:
            exists = session.exec(
                select(Calculator).where(
                    Calculator.name == record["name"], Calculator.version == record["version"]
                )
            ).first()
            if exists is None:
                register(session, **record)


def register(session: Session, **record: Any) -> Calculator:
    """Add a new immutable version; an existing name@version is never changed. The first
    version of a name becomes its default; later ones never change the default."""
    exists = session.exec(
        select(Calculator).where(
            Calculator.name == record["name"], Calculator.version == record["version"]
        )
    ).first()
    if exists is not None:
        raise ApiError(
            409,
            "calculator_exists",
            f"calculator {exists.ref} is already registered and cannot change; "
            "register a new version instead",
        )
    unknown = sorted(set(record.get("elements", [])) - set(ALL_ELEMENTS))
    if unknown:
        raise ApiError(422, "unknown_element", f"not chemical elements: {', '.join(unknown)}")
    calculator = Calculator(**record)
    session.add(calculator)
    session.flush()
    if default_version(session, calculator.name) is None:
        record_default(session, calculator, None, "the first version registered of this name")
    return calculator


def default_version(session: Session, name: str) -> Calculator | None:
    """The version a bare name means now (the newest decision), retired or not."""
    found = session.exec(
        select(Calculator)
        .join(DefaultVersion, col(DefaultVersion.calculator_id) == col(Calculator.id))
        .where(DefaultVersion.name == name)
        .order_by(col(DefaultVersion.id).desc())
        .limit(1)
    ).first()
    return found


def record_default(
    session: Session, calculator: Calculator, admin: User | None, reason: str
) -> DefaultVersion:
    assert calculator.id is not None
    decision = DefaultVersion(
        name=calculator.name,
        calculator_id=calculator.id,
        set_by_id=None if admin is None else admin.id,
        reason=reason,
    )
    session.add(decision)
    session.flush()
    return decision


def set_default(session: Session, name: str, version: str, admin: User, reason: str) -> Calculator:
    """An admin's decision that a bare `name` now means `name@version` (an active one)."""
    calculator = find(session, name, version)
    if calculator.retired:
        raise ApiError(
            422,
            "retired_calculator",
            f"{calculator.ref} is retired and cannot be the default; choose an active version",
        )
    if (current := default_version(session, name)) is not None and current.id == calculator.id:
        return calculator  # already in force: nothing to record
    record_default(session, calculator, admin, reason)
    return calculator


def retire(session: Session, calculator: Calculator, admin: User, new_default: str | None) -> None:
    """Refuse new jobs for a version. Retiring a name's default names its successor in the
    same request, so a bare name never silently starts meaning another version."""
    others = session.exec(
        select(Calculator.version).where(
            Calculator.name == calculator.name,
            Calculator.retired == False,  # noqa: E712
            Calculator.id != calculator.id,
        )
    ).all()
    current = default_version(session, calculator.name)
    is_default = current is not None and current.id == calculator.id
    if new_default is not None:
        if new_default == calculator.version:
            raise ApiError(
                422, "new_default_is_retiring", f"{calculator.ref} cannot succeed itself"
            )
        set_default(session, calculator.name, new_default, admin, f"{calculator.ref} retired")
    elif is_default and others:
        raise ApiError(
            422,
            "default_needs_successor",
            f"{calculator.ref} is the default version of {calculator.name!r}; retiring it "
            f"needs the new default in the same request (new_default: one of "
            f"{', '.join(sorted(others))})",
        )
    calculator.retired = True
    session.add(calculator)


def resolve(session: Session, reference: str) -> Calculator:
    """Pin 'name' to its default version, or find the exact 'name@version'."""
    name, _, version = reference.partition("@")
    if not version:
        default = default_version(session, name)
        if default is not None and not default.retired:
            return default  # one indexed query on the submission path
    versions = session.exec(
        select(Calculator).where(Calculator.name == name).order_by(col(Calculator.id).desc())
    ).all()
    if not versions:
        known = session.exec(select(Calculator.name).distinct()).all()
        raise ApiError(
            422,
            "unknown_calculator",
            f"unknown calculator {name!r}; registered calculators: {', '.join(sorted(known))}",
        )
    active = [c for c in versions if not c.retired]
    if not version:
        if not active:
            raise ApiError(
                422, "retired_calculator", f"every version of calculator {name!r} is retired"
            )
        raise ApiError(
            422,
            "retired_calculator",
            f"the default version of {name!r} is retired; name a version (active: "
            f"{', '.join(c.version for c in active)}) or ask an admin to set a new default",
        )
    for calculator in versions:
        if calculator.version == version:
            if calculator.retired:
                # Only on this refusal: an exact version costs one query, as before.
                default = default_version(session, name)
                usable = default if default is not None and not default.retired else None
                instead = usable or (active[0] if active else None)
                newer = f"; use {instead.ref}" if instead is not None else ""
                raise ApiError(
                    422,
                    "retired_calculator",
                    f"calculator {calculator.ref} is retired and takes no new jobs{newer}",
                )
            return calculator
    raise ApiError(
        422,
        "unknown_calculator",
        f"calculator {name!r} has no version {version!r}; versions: "
        + ", ".join(c.version for c in versions)
        + (f" (active: {', '.join(c.version for c in active)})" if active else ""),
    )


def weights_identity(path: str, expected_sha256: str | None) -> tuple[str, int]:
    """sha256 and size of a weights file being registered, read on the service machine."""
    file = Path(path)
    if not file.is_file():
        raise ApiError(
            422,
            "weights_not_found",
            f"weights file {path} is not readable on the service machine; put it in a folder "
            "the service and the workers share, and give its absolute path",
        )
    digest = hashlib.sha256()
    with file.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    sha256 = digest.hexdigest()
    if expected_sha256 is not None and expected_sha256 != sha256:
        raise ApiError(
            422,
            "weights_sha256_mismatch",
            f"weights file {path} has sha256 {sha256}, not the {expected_sha256} you gave; "
            "check that it is the file you meant",
        )
    return sha256, file.stat().st_size


def find(session: Session, name: str, version: str) -> Calculator:
    calculator = session.exec(
        select(Calculator).where(Calculator.name == name, Calculator.version == version)
    ).first()
    if calculator is None:
        raise ApiError(404, "calculator_not_found", f"no calculator {name}@{version}")
    return calculator


def to_public(session: Session, calculators: Sequence[Calculator]) -> list[CalculatorPublic]:
    """Records with how many jobs each ran and which live workers can (or cannot) run it:
    two queries for any number of versions."""
    ids = [c.id for c in calculators]
    runs = dict(
        session.exec(
            select(Job.calculator_id, func.count())
            .where(col(Job.calculator_id).in_(ids), Job.attempts > 0)
            .group_by(col(Job.calculator_id))
        ).all()
    )
    workers = live_workers(session)
    defaults = default_ids(session, {c.name for c in calculators})
    return [
        CalculatorPublic.model_validate(
            {
                **c.model_dump(),
                "ref": c.ref,
                "is_default": c.id in defaults,
                "jobs_run": runs.get(c.id or 0, 0),
                "workers": [w.name for w in workers if c.ref in w.calculators],
                "unavailable": {
                    w.name: w.unavailable[c.ref] for w in workers if c.ref in w.unavailable
                },
            }
        )
        for c in calculators
    ]


def default_ids(session: Session, names: set[str]) -> set[int]:
    """The calculator ids in force as default for these names, in one query."""
    newest = (
        select(func.max(DefaultVersion.id))
        .where(col(DefaultVersion.name).in_(names))
        .group_by(col(DefaultVersion.name))
    )
    return set(
        session.exec(
            select(DefaultVersion.calculator_id).where(col(DefaultVersion.id).in_(newest))
        ).all()
    )


def default_history(session: Session, name: str) -> list[DefaultVersionPublic]:
    """Every decision about what `name` means, oldest first, with who made it."""
    rows = session.exec(
        select(DefaultVersion, Calculator, User)
        .join(Calculator, col(Calculator.id) == col(DefaultVersion.calculator_id))
        .join(User, col(User.id) == col(DefaultVersion.set_by_id), isouter=True)
        .where(DefaultVersion.name == name)
        .order_by(col(DefaultVersion.id))
    ).all()
    if not rows:
        raise ApiError(404, "calculator_not_found", f"no calculator named {name!r}")
    return [
        DefaultVersionPublic(
            name=decision.name,
            version=calculator.version,
            ref=calculator.ref,
            set_by=None if user is None else user.name,
            reason=decision.reason,
            set_at=decision.set_at,
        )
        for decision, calculator, user in rows
    ]
