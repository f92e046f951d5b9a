"""The OpenAPI document is valid and describes the stable contract."""

from __future__ import annotations


def test_openapi_document_validates(http) -> None:
    from openapi_spec_validator import validate

    spec = http.get("/openapi.json").json()
    validate(spec)  # raises on an invalid document
    assert http.get("/docs").status_code == 200


def test_contract_routes_are_documented_with_problem_responses(http) -> None:
    spec = http.get("/openapi.json").json()
    paths = spec["paths"]
    expected = {
        ("post", "/v1/studies"),
        ("post", "/v1/studies/{study}/participants/{pid}/nights"),
        ("get", "/v1/studies/{study}/participants"),
        ("get", "/v1/studies/{study}/participants/{pid}/nights"),
        ("get", "/v1/studies/{study}/participants/{pid}/nights/{night_id}"),
        ("delete", "/v1/studies/{study}/participants/{pid}"),
        ("post", "/v1/studies/{study}/participants/{pid}/training"),
        ("post", "/v1/studies/{study}/pooled/training"),
        ("get", "/v1/jobs/{job_id}"),
        ("post", "/v1/jobs/{job_id}/cancel"),
        ("get", "/v1/studies/{study}/participants/{pid}/models"),
        ("post", "/v1/studies/{study}/participants/{pid}/models/{version}/activate"),
        ("get", "/v1/studies/{study}/participants/{pid}/nights/{night_id}/scoring"),
        ("get", "/v1/studies/{study}/participants/{pid}/comparison"),
        ("get", "/v1/studies/{study}/comparison"),
        ("get", "/v1/studies/{study}/exports/parameters"),
        ("get", "/healthz"),
        ("get", "/metrics"),
    }
    documented = {(m, p) for p, ops in paths.items() for m in ops}
    assert expected <= documented
    for path, method in [("/v1/studies", "post"), ("/v1/studies/{study}/participants/{pid}/nights", "post")]:
        responses = paths[path][method]["responses"]
        assert {"400", "401", "422"} <= set(responses)
        assert "application/problem+json" in responses["422"]["content"]
    ingest = paths["/v1/studies/{study}/participants/{pid}/nights"]["post"]["requestBody"]["content"]
    assert {"application/json", "text/csv", "application/vnd.apache.parquet"} <= set(ingest)
    operation_ids = [op["operationId"] for ops in paths.values() for op in ops.values()]
    assert len(operation_ids) == len(set(operation_ids))
