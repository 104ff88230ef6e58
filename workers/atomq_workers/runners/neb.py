"""neb: ASE's nudged elastic band, wrapped, with one calculator instance per image as
ASE recommends."""

from __future__ import annotations

from collections.abc import Callable

import ase.io
import numpy as np
from ase import Atoms
from ase.calculators.calculator import Calculator
from ase.calculators.singlepoint import SinglePointCalculator
from ase.mep import NEB, NEBTools

from atomq.results import NEBImage, NEBResult
from atomq.structure import Structure
from atomq.tasks import NEB as NEBTask
from atomq_workers.artifacts import ArtifactWriter
from atomq_workers.runners import Reporter
from atomq_workers.runners.common import OPTIMIZERS


def run_neb(
    make_calculator: Callable[[], Calculator],
    task: NEBTask,
    report: Reporter,
    artifacts: ArtifactWriter,
) -> NEBResult:
    # The service stores resolved endpoints, so both are inline structures here.
    assert isinstance(task.initial, Structure) and isinstance(task.final, Structure)
    initial, final = task.initial.to_atoms(), task.final.to_atoms()
    images = [initial] + [initial.copy() for _ in range(task.images)] + [final]
    for image in images:
        image.calc = make_calculator()
    band = NEB(images, k=task.spring_constant, climb=task.climb, method=task.method)
    band.interpolate(method=task.interpolation)
    optimizer = OPTIMIZERS[task.optimizer](band, logfile=None)  # type: ignore[arg-type]

    def observe() -> None:
        # band.energies and the residual were filled by the force call just made.
        report(
            optimizer.nsteps,
            task.max_steps,
            energy=float(np.max(band.energies)),  # type: ignore[arg-type]
            fmax=float(band.get_residual()),
        )

    optimizer.attach(observe, interval=1)
    converged = bool(optimizer.run(fmax=task.fmax, steps=task.max_steps))
    frozen = [freeze(image) for image in images]
    write_images(artifacts, frozen)
    energies = [float(image.get_potential_energy()) for image in frozen]
    path = NEBTools(frozen).get_fit().path
    top = int(np.argmax(energies))
    return NEBResult(
        energy=energies[top],
        forces=[(float(f[0]), float(f[1]), float(f[2])) for f in frozen[top].get_forces()],
        structure=Structure.from_atoms(frozen[top]),
        highest_image=top,
        forward_barrier=energies[top] - energies[0],
        reverse_barrier=energies[top] - energies[-1],
        reaction_energy=energies[-1] - energies[0],
        profile=[
            NEBImage(index=i, path_coordinate=float(s), energy=e)
            for i, (s, e) in enumerate(zip(path, energies, strict=True))
        ],
        converged=converged,
        steps=optimizer.nsteps,
    )


def freeze(image: Atoms) -> Atoms:
    """A copy holding the image's energy and forces, detached from its calculator."""
    energy = image.get_potential_energy()
    forces = image.get_forces()
    frozen: Atoms = image.copy()
    frozen.calc = SinglePointCalculator(frozen, energy=energy, forces=forces)
    return frozen


def write_images(artifacts: ArtifactWriter, images: list[Atoms]) -> None:
    handle = artifacts.open("images.extxyz", "chemical/x-extxyz")
    ase.io.write(handle, images, format="extxyz")
    handle.flush()
