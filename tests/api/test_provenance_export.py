"""Lineage and W3C PROV-JSON export: "what produced this number", parents included."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
from ase.build import bulk
from fastapi.testclient import TestClient

from atomq import NEB, JobCreate, JobReference, Relax, Structure
from atomq_service.app import create_app
from atomq_service.settings import Settings
from atomq_workers.execute import run_job
from tests.conftest import App

# Required attributes of each relation in the PROV-JSON serialization (W3C member
# submission "PROV-JSON", its JSON schema; recalled from memory).
REQUIRED = {
    "used": ("prov:activity",),
    "wasGeneratedBy": ("prov:entity",),
    "wasAssociatedWith": ("prov:activity",),
    "wasAttributedTo": ("prov:entity", "prov:agent"),
    "wasDerivedFrom": ("prov:generatedEntity", "prov:usedEntity"),
    "actedOnBehalfOf": ("prov:delegate", "prov:responsible"),
}
DECLARED_AS = {
    "prov:entity": "entity",
    "prov:activity": "activity",
    "prov:agent": "agent",
    "prov:generatedEntity": "entity",
    "prov:usedEntity": "entity",
    "prov:delegate": "agent",
    "prov:responsible": "agent",
}


def submit_and_run(app: App, body: JobCreate) -> int:
    headers = {**app.headers, "Content-Type": "application/json"}
    answer = app.http.post("/v1/jobs", content=body.model_dump_json(), headers=headers)
    assert answer.status_code == 201, answer.text
    job_id = int(answer.json()["id"])
    assert run_job(app.engine, job_id, app.settings).state == "succeeded"
    return job_id


def vacancy_hop() -> tuple[Structure, Structure]:
    """A vacancy in Cu and the state after a neighbour hopped into it."""
    cell = bulk("Cu", "fcc", a=3.61, cubic=True).repeat(2)
    vacancy_at = cell.positions[0].copy()
    del cell[0]
    hopped = cell.copy()
    neighbour = int(np.argmin(np.linalg.norm(hopped.positions - vacancy_at, axis=1)))
    hopped.positions[neighbour] = vacancy_at
    return Structure.from_atoms(cell), Structure.from_atoms(hopped)


def test_lineage_and_prov_json_name_every_parent(app: App) -> None:
    start, end = vacancy_hop()
    relax = Relax(fmax=0.05, max_steps=100)
    tags = ["vacancy-study"]
    a = submit_and_run(app, JobCreate(structure=start, task=relax, calculator="emt", tags=tags))
    b = submit_and_run(app, JobCreate(structure=end, task=relax, calculator="emt", tags=tags))
    band = NEB(
        initial=JobReference(job=a),
        final=JobReference(job=b),
        images=1,
        interpolation="linear",
        fmax=0.2,
        max_steps=30,
    )
    neb = submit_and_run(app, JobCreate(task=band, calculator="emt", tags=tags))

    lineage = app.http.get(f"/v1/jobs/{neb}/lineage", headers=app.headers).json()
    assert [record["job_id"] for record in lineage] == [neb, a, b]
    assert lineage[0]["parents"] == [a, b]
    assert {record["calculator"] for record in lineage} == {"emt@1"}

    document = app.http.get(f"/v1/jobs/{neb}/prov-json", headers=app.headers).json()
    assert_valid_prov(document)
    derived = {
        (r["prov:generatedEntity"], r["prov:usedEntity"])
        for r in document["wasDerivedFrom"].values()
    }
    for parent in (a, b):
        assert (f"atomq:job-{neb}-result", f"atomq:job-{parent}-result") in derived
        generated = {
            (r["prov:entity"], r["prov:activity"]) for r in document["wasGeneratedBy"].values()
        }
        assert (f"atomq:job-{parent}-result", f"atomq:job-{parent}-run") in generated
    artifacts = [e for e in document["entity"].values() if e["prov:type"] == "atomq:artifact"]
    assert [e["prov:label"] for e in artifacts] == ["images.extxyz"]

    tagged = app.http.get("/v1/prov-json", params={"tag": "vacancy-study"}, headers=app.headers)
    assert_valid_prov(tagged.json())
    assert set(tagged.json()["activity"]) == {f"atomq:job-{j}-run" for j in (a, b, neb)}


def assert_valid_prov(document: dict[str, Any]) -> None:
    assert document["prefix"]["atomq"]
    for kind, required in REQUIRED.items():
        for record in document.get(kind, {}).values():
            for key in required:
                assert key in record, (kind, record)
            for key, value in record.items():
                if key in DECLARED_AS:  # every reference points at a declared record
                    assert value in document[DECLARED_AS[key]], (kind, key, value)


def _expanded_identifiers(document: dict[str, Any]) -> set[str]:
    """Every declared identifier with its prefix written out (blank relation ids aside)."""
    (prefix,) = document["prefix"].values()
    return {
        name.replace("atomq:", prefix, 1)
        for kind in ("entity", "activity", "agent")
        for name in document[kind]
    }


def test_prov_json_of_two_deployments_shares_no_identifier(tmp_path: Path) -> None:
    """Two installations, the same work as job 1 in each: the documents never collide, a
    value a record lacks (a seed, weights) is left out, and W3C PROV's own Python
    implementation (the `prov` package) reads each document."""
    import prov.model

    documents = []
    for lab in ("north-lab", "south-lab"):
        settings = Settings(data_dir=tmp_path / lab, broker_url="memory://")
        with TestClient(create_app(settings)) as http:
            app = App(http, settings)
            atoms = bulk("Cu", "fcc", a=3.61, cubic=True)
            body = JobCreate(structure=Structure.from_atoms(atoms), task=Relax(), calculator="emt")
            job = submit_and_run(app, body)
            answer = app.http.get(f"/v1/jobs/{job}/prov-json", headers=app.headers)
            assert answer.status_code == 200, answer.text
            documents.append(answer.json())
    first, second = (_expanded_identifiers(d) for d in documents)
    assert first and second and not first & second
    for document in documents:
        (run,) = document["activity"].values()
        assert "atomq:seed" not in run  # a relaxation has no seed: nothing is made up
        calculators = [
            e for e in document["entity"].values() if e["prov:type"] == "atomq:calculator"
        ]
        assert calculators and all("atomq:weights_sha256" not in c for c in calculators)
        parsed = prov.model.ProvDocument.deserialize(content=json.dumps(document), format="json")
        assert len(list(parsed.get_records(prov.model.ProvActivity))) == 1
