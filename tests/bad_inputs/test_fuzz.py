"""Property-based fuzzing of the whole API from its own OpenAPI document (Schemathesis).

Against a real uvicorn server on a loopback port with a seeded dataset, job and model:
no answer may be a 5xx, and every answer must use a documented status code, content
type and schema. Bounded: a fixed number of examples per operation, derandomised so a
failure reproduces.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest
import schemathesis
from hypothesis import HealthCheck, Phase, given, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service.settings import Settings
from tests.bad_inputs.conftest import LIMITS, Seeded, seed
from tests.service.conftest import live_api

CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_schema_conformance]
EXAMPLES = 25  # per operation: 14 operations, at most 350 generated requests


@pytest.fixture(scope="module")
def fuzzed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Seeded]:
    home = tmp_path_factory.mktemp("fuzz") / "home"
    with live_api(Settings(home=home, **LIMITS)) as api:
        yield seed(api)


def test_api_never_fails_and_matches_its_description(fuzzed: Seeded) -> None:
    schema = schemathesis.openapi.from_url(f"{fuzzed.api.base}/openapi.json")
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 14  # every route is described, so every route is fuzzed
    sent: list[int] = []

    for operation in operations:

        @given(case=operation.as_strategy())
        @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
                  suppress_health_check=list(HealthCheck), phases=[Phase.explicit,
                  Phase.generate])
        def run(case) -> None:  # type: ignore[no-untyped-def]
            response = case.call_and_validate(base_url=fuzzed.api.base, checks=CHECKS,
                                              timeout=30)
            sent.append(response.status_code)

        run()
    assert len(sent) >= 100  # the fuzzing really ran
    assert max(sent) < 500
