"""Which version a bare calculator name means: an admin's recorded decision. Registering
a version never changes it; retiring the default names its successor in the same request."""

from __future__ import annotations

from typing import Any

from tests.api.bodies import SINGLE_POINT
from tests.conftest import App

EMT_2 = {
    "name": "emt",
    "version": "2",
    "backend": "emt",
    "elements": ["Cu", "Ni", "Al"],
    "notes": "the same EMT, registered again for the group's upgrade rehearsal",
}


def submit(app: App, calculator: str) -> dict[str, Any]:
    answer = app.http.post(
        "/v1/jobs", json={**SINGLE_POINT, "calculator": calculator}, headers=app.headers
    )
    assert answer.status_code == 201, answer.text
    body: dict[str, Any] = answer.json()
    return body


def test_registering_a_version_leaves_the_default_alone(app: App) -> None:
    assert submit(app, "emt")["calculator"] == "emt@1"
    registered = app.http.post("/v1/calculators", json=EMT_2, headers=app.headers)
    assert registered.status_code == 201, registered.text
    assert registered.json()["is_default"] is False
    assert submit(app, "emt")["calculator"] == "emt@1"  # before default versions: emt@2
    assert submit(app, "emt@2")["calculator"] == "emt@2"

    history = app.http.get("/v1/defaults/emt", headers=app.headers).json()
    assert [(d["ref"], d["set_by"]) for d in history] == [("emt@1", None)]


def test_an_admin_changes_the_default_and_it_is_recorded(app: App) -> None:
    app.http.post("/v1/calculators", json=EMT_2, headers=app.headers)
    member = {"Authorization": f"Bearer {app.token_for('rowan')}"}
    refused = app.http.put("/v1/defaults/emt", json={"version": "2"}, headers=member)
    assert refused.status_code == 403

    changed = app.http.put(
        "/v1/defaults/emt",
        json={"version": "2", "reason": "rehearsal of the lab's potential upgrade"},
        headers=app.headers,
    )
    assert changed.status_code == 200, changed.text
    assert changed.json()["ref"] == "emt@2" and changed.json()["is_default"] is True
    assert submit(app, "emt")["calculator"] == "emt@2"
    history = app.http.get("/v1/defaults/emt", headers=member).json()
    assert [(d["ref"], d["set_by"]) for d in history] == [("emt@1", None), ("emt@2", "ada-admin")]
    assert history[1]["reason"] == "rehearsal of the lab's potential upgrade"
    listing = {
        c["ref"]: c["is_default"] for c in app.http.get("/v1/calculators", headers=member).json()
    }
    assert listing["emt@2"] is True and listing["emt@1"] is False


def test_retiring_the_default_needs_its_successor(app: App) -> None:
    app.http.post("/v1/calculators", json=EMT_2, headers=app.headers)
    refused = app.http.post("/v1/calculators/emt/1/retire", headers=app.headers)
    assert refused.status_code == 422
    assert refused.json()["code"] == "default_needs_successor"
    assert "new_default: one of 2" in refused.json()["detail"]
    assert submit(app, "emt@1")["calculator"] == "emt@1"  # nothing was retired

    retired = app.http.post(
        "/v1/calculators/emt/1/retire", json={"new_default": "2"}, headers=app.headers
    )
    assert retired.status_code == 200, retired.text
    assert retired.json()["retired"] is True
    assert submit(app, "emt")["calculator"] == "emt@2"
    history = app.http.get("/v1/defaults/emt", headers=app.headers).json()
    assert history[-1]["reason"] == "emt@1 retired" and history[-1]["ref"] == "emt@2"
    gone = app.http.post(
        "/v1/jobs", json={**SINGLE_POINT, "calculator": "emt@1"}, headers=app.headers
    )
    assert gone.status_code == 422 and "use emt@2" in gone.json()["detail"]


def test_a_version_that_is_not_the_default_retires_without_a_successor(app: App) -> None:
    app.http.post("/v1/calculators", json=EMT_2, headers=app.headers)
    retired = app.http.post("/v1/calculators/emt/2/retire", headers=app.headers)
    assert retired.status_code == 200, retired.text
    assert submit(app, "emt")["calculator"] == "emt@1"
    refused = app.http.put("/v1/defaults/emt", json={"version": "2"}, headers=app.headers)
    assert refused.status_code == 422 and "retired" in refused.json()["detail"]


def test_the_last_version_of_a_name_retires_and_the_name_is_refused(app: App) -> None:
    retired = app.http.post("/v1/calculators/morse-cu/1/retire", headers=app.headers)
    assert retired.status_code == 200, retired.text
    refused = app.http.post(
        "/v1/jobs", json={**SINGLE_POINT, "calculator": "morse-cu"}, headers=app.headers
    )
    assert refused.status_code == 422
    assert "every version of calculator 'morse-cu' is retired" in refused.json()["detail"]


def test_the_client_warns_when_no_live_worker_can_run_the_pinned_version(app: App) -> None:
    """In-process there is no worker at all: the submission queues, and says why it waits."""
    import warnings

    from ase.build import bulk

    from atomq import Client, SinglePoint

    transport = app.http._transport
    with (
        Client(url="http://testserver", token=app.token, transport=transport) as client,
        warnings.catch_warnings(record=True) as caught,
    ):
        warnings.simplefilter("always")
        job = client.submit(bulk("Cu", "fcc", a=3.6), SinglePoint(), calculator="emt")
    assert job.calculator == "emt@1"
    assert [str(w.message) for w in caught] == [
        f"job {job.id} (emt@1) waits: no worker is running; start one with `atomq worker` "
        "to run emt@1"
    ]
