"""Property-based run of every GET route of the OpenAPI document (hypothesis): any query, any path value,
the API answers with a documented status and a JSON body of the shape the document promises - never a 500.

Each operation, its parameters and its responses come from the application's own OpenAPI document, so a new
route is fuzzed without a change here.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shadow.api.app import create_app, openapi_document
from shadow.api.security import GuardSettings
from shadow.store.repository import SqlStore

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

TEXT = st.one_of(
    st.text(max_size=30),
    st.sampled_from(["2026-12-02T03:00:00Z", "2026-13-40", "-1", "0", "1e309", "NaN", "northfield", "a/b/c", ""]),
    st.integers(-(10**12), 10**12).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(str),
)


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> TestClient:
    store = SqlStore(f"sqlite:///{Path(tmp_path_factory.mktemp('fuzz')) / 'f.db'}")
    store.register_robot("northfield/line3/picker-1", family="delta", n_actuators=3)
    return TestClient(create_app(store, guard=GuardSettings(rate_per_s=1e9, burst=10**9)))


def operations() -> list[tuple[str, dict[str, Any]]]:
    doc = openapi_document(create_app(SqlStore("sqlite:///:memory:")))
    return [(path, ops["get"]) for path, ops in doc["paths"].items()]


@pytest.mark.parametrize(("path", "operation"), operations(), ids=[p for p, _ in operations()])
def test_any_request_gets_a_documented_answer(client: TestClient, path: str, operation: dict[str, Any]) -> None:
    params = operation.get("parameters", [])
    path_names = [p["name"] for p in params if p["in"] == "path"]
    query_names = [p["name"] for p in params if p["in"] == "query"]
    documented = {int(code) for code in operation["responses"]} | {400, 401, 404, 405, 413, 414, 422, 429}

    @settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
    @given(
        path_values=st.fixed_dictionaries({n: TEXT for n in path_names}),
        query=st.dictionaries(st.sampled_from(query_names or ["x"]), TEXT, max_size=4),
    )
    def check(path_values: dict[str, str], query: dict[str, str]) -> None:
        url = path
        for name, value in path_values.items():
            url = url.replace("{" + name + "}", quote(value, safe="") or "_")  # any text, percent-encoded
        response = client.get(url, params=query)
        assert response.status_code in documented, (url, query, response.status_code, response.text[:200])
        assert response.status_code < 500
        if response.headers["content-type"].startswith("application/json"):
            body = response.json()
            if response.status_code >= 400:
                assert set(body) == {"error", "detail"} and body["detail"], body

    check()
