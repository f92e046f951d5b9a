"""Property-based fuzzing of every documented operation (schemathesis on the OpenAPI document).

Requests go to the ASGI app over a real migrated database (a SQLite file, then a throwaway
PostgreSQL database, with the same examples), with a lab-wide admin token so that the handlers run
past authentication. Every response must not be a 5xx, must carry a documented
status code and content type, and its body must match the documented schema.
"""

from __future__ import annotations

from typing import Any

import pytest
import schemathesis
from backends import BACKENDS
from harness import bearer, cohort_bodies
from hypothesis import HealthCheck, Phase, given
from hypothesis import settings as hyp_settings
from schemathesis import checks

#: Examples per operation and run: three runs (path parameters pinned to stored data, free, and
#: negative) of every operation keep the test to a few minutes and over 1,000 requests.
EXAMPLES_PER_RUN = 12
MIN_REQUESTS = 1000
#: PostgreSQL answers each request slower; fewer examples (same seed) keep its run shorter.
PG_EXAMPLES_PER_RUN = 4
PG_MIN_REQUESTS = 400
#: A schema-valid night may still be refused (422) for what a JSON schema cannot state (at least
#: 1 h of recording, times that parse), so acceptance of positive data is not required.
CHECKS = [checks.not_a_server_error, checks.status_code_conformance, checks.content_type_conformance,
          checks.response_schema_conformance, checks.response_headers_conformance, checks.negative_data_rejection]


@pytest.fixture(scope="module", params=BACKENDS)
def fuzz_world(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Any:
    """A migrated database with one study, one participant and nights; the app; an admin token."""
    from contextlib import ExitStack

    with ExitStack() as stack:
        if request.param == "sqlite":
            url = f"sqlite:///{tmp_path_factory.mktemp('fuzz') / 'nightbank.db'}"
        else:
            from pg_support import throwaway_database

            url = stack.enter_context(throwaway_database())
        for world in _world(url):
            examples, minimum = ((EXAMPLES_PER_RUN, MIN_REQUESTS) if request.param == "sqlite"
                                 else (PG_EXAMPLES_PER_RUN, PG_MIN_REQUESTS))
            yield {**world, "examples": examples, "min_requests": minimum}


def _world(url: str) -> Any:
    from fastapi.testclient import TestClient

    from service.app import create_app
    from service.config import Settings
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    s = Settings(db=url, n_trials=1, job_workers=0, token_cache_s=5.0)
    upgrade(s)
    engine = make_engine(s)
    with session_scope(make_session_factory(engine), write=True) as session:
        token = create_token(session, role="admin", actor="test")[1]
    engine.dispose()
    app = create_app(s)
    headers = bearer(token)
    with TestClient(app) as client:
        assert client.post("/v1/studies", json={"study_id": "s1", "name": "Study one"},
                           headers=headers).status_code == 201
        night_ids = []
        for body in cohort_bodies(n_participants=1, nights=2)["P-01"]:
            r = client.post("/v1/studies/s1/participants/P-01/nights", json=body, headers=headers)
            assert r.status_code == 201
            night_ids.append(r.json()["night_id"])
        job = client.post("/v1/studies/s1/participants/P-01/training", json={}, headers=headers)
        assert job.status_code == 202, job.text
        path = {"study": "s1", "pid": "P-01", "night_id": night_ids[0], "job_id": job.json()["job_id"]}
        yield {"app": app, "headers": headers, "path": path}


def _fuzz(operation: Any, strategy: Any, headers: dict[str, str], calls: list[str], examples: int) -> None:
    @given(case=strategy)
    @hyp_settings(max_examples=examples, deadline=None, database=None, derandomize=True,
                  suppress_health_check=list(HealthCheck), phases=[Phase.explicit, Phase.generate])
    def run(case: Any) -> None:
        response = case.call(headers=headers)
        calls.append(operation.label)
        assert response.status_code < 500, (operation.label, response.status_code, response.text[:500])
        case.validate_response(response, checks=CHECKS)

    run()


def test_every_operation_conforms_to_its_documentation(fuzz_world: Any) -> None:
    from schemathesis.generation import GenerationMode

    schema = schemathesis.openapi.from_asgi("/openapi.json", fuzz_world["app"])
    operations = [result.ok() for result in schema.get_all_operations()]
    # destructive operations last, so the pinned runs of the others still find the stored data
    operations.sort(key=lambda op: op.method.lower() == "delete")
    calls: list[str] = []
    headers, examples = fuzz_world["headers"], fuzz_world["examples"]
    for operation in operations:
        names = {p.name for p in operation.path_parameters}
        pinned = {k: v for k, v in fuzz_world["path"].items() if k in names}
        _fuzz(operation, operation.as_strategy(GenerationMode.POSITIVE, path_parameters=pinned or None),
              headers, calls, examples)
        _fuzz(operation, operation.as_strategy(GenerationMode.POSITIVE), headers, calls, examples)
        if list(operation.iter_parameters()) or operation.body:  # nothing to break in an input-less operation
            _fuzz(operation, operation.as_strategy(GenerationMode.NEGATIVE), headers, calls, examples)
    assert {op.label for op in operations} <= set(calls)
    print(f"{len(calls)} requests over {len(operations)} operations")
    assert len(calls) >= fuzz_world["min_requests"], len(calls)
