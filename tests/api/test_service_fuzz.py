"""Property-based fuzzing of every endpoint from the app's own OpenAPI schema (schemathesis)."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from fastapi import FastAPI
from hypothesis import HealthCheck, settings
from pydantic import SecretStr
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    negative_data_rejection,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from api.app import create_app
from api.settings import ServiceSettings
from tests.api.svc_helpers import ADMIN_TOKEN, TestClient, admin_headers

pytestmark = pytest.mark.slow

# Checks from schemathesis' catalogue: no 5xx, statuses / content types / bodies / headers as
# documented, and data that breaks the schema rejected with a 4xx.
CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
    response_headers_conformance,
    negative_data_rejection,
]


@pytest.fixture(scope="module")
def fuzz_app(
    index_dir: Path, model_path: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[FastAPI]:
    """An app on a private index copy (the admin calls change it), lifespan running."""
    folder = tmp_path_factory.mktemp("fuzz")
    shutil.copytree(index_dir, folder / "idx")
    app = create_app(
        ServiceSettings(
            index_dir=folder / "idx",
            model_path=model_path,
            log_dir=folder / "log",
            state_dir=folder / "state",
            admin_token=SecretStr(ADMIN_TOKEN),
            max_k=50,
            max_clue_chars=500,
            max_batch=8,
            # Large enough that schema-breaking bodies reach validation (422): the fuzzer
            # does not count a 413 from the size limit (tested in test_bad_input) as a rejection.
            max_body_bytes=2_000_000,
        )
    )
    with TestClient(app):
        yield app


@pytest.fixture
def api_schema(fuzz_app: FastAPI) -> Any:
    """The schema the app publishes at /openapi.json, bound to the app itself."""
    return schemathesis.openapi.from_asgi("/openapi.json", fuzz_app)


schema = schemathesis.pytest.from_fixture("api_schema")


@schema.parametrize()
@settings(max_examples=40, deadline=None, suppress_health_check=list(HealthCheck))
def test_every_endpoint_conforms_and_never_fails(case: Any) -> None:
    case.call_and_validate(headers=admin_headers(), checks=CHECKS)


@schema.parametrize()
@settings(max_examples=10, deadline=None, suppress_health_check=list(HealthCheck))
def test_without_credentials_admin_is_refused(case: Any) -> None:
    response = case.call_and_validate(checks=CHECKS)
    if case.path.startswith("/v1/admin/"):
        assert 400 <= response.status_code < 500  # never let through without the token
