"""The committed OpenAPI document is the app's, and every operation is documented."""

from __future__ import annotations

import json
from pathlib import Path

from service.app import openapi_document
from service.cli import main

COMMITTED = Path(__file__).resolve().parents[2] / "openapi" / "openapi.json"


def test_committed_document_is_up_to_date():
    assert COMMITTED.exists(), "run `heedful openapi` and commit openapi/openapi.json"
    committed = json.loads(COMMITTED.read_text(encoding="utf-8"))
    assert committed == openapi_document(), (
        "openapi/openapi.json is out of date: run `heedful openapi` (or `make openapi`)"
    )


def _has_example(document, operation) -> bool:
    def resolved(schema):
        ref = schema.get("$ref")
        return document["components"]["schemas"][ref.split("/")[-1]] if ref else schema

    if "204" in operation["responses"]:
        return True  # nothing to show: the reply has no body
    bodies = [operation.get("requestBody", {}).get("content", {})]
    bodies += [r.get("content", {}) for code, r in operation["responses"].items()
               if code.startswith("2")]
    for content in bodies:
        for media in content.values():
            if "examples" in media or "example" in media:
                return True
            schema = resolved(media.get("schema", {}))
            if "examples" in schema or "example" in schema:
                return True
    return False


def test_every_operation_has_a_stable_id_summary_and_example():
    document = openapi_document()
    ids = []
    for path, operations in document["paths"].items():
        for method, operation in operations.items():
            ids.append(operation["operationId"])
            assert operation.get("summary"), (method, path)
            assert _has_example(document, operation), (method, path)
            for code, response in operation["responses"].items():
                if code.startswith(("4", "5")):
                    assert "application/problem+json" in response["content"], (method, path, code)
    assert len(ids) == len(set(ids))
    # Operation ids are part of the contract: renaming one breaks generated clients.
    assert set(ids) >= {
        "health", "ready", "registerSurvey", "listSurveys", "getSurvey", "rotateWebhookSecret",
        "rescreenSurvey", "getSurveySummary", "postResponses", "listRespondents",
        "getRespondent", "reviewRespondent", "eraseRespondent", "listDetectors",
    }


def test_command_writes_the_document(tmp_path, capsys):
    out = tmp_path / "openapi.json"
    assert main(["openapi", "--out", str(out)]) == 0
    assert json.loads(out.read_text()) == openapi_document()


def test_every_reference_resolves():
    document = openapi_document()

    def references(node):
        if isinstance(node, dict):
            for key, value in node.items():
                if key == "$ref":
                    yield value
                else:
                    yield from references(value)
        elif isinstance(node, list):
            for value in node:
                yield from references(value)

    found = set(references(document))
    assert "#/components/schemas/FieldErrorOut" in found
    for ref in found:
        assert ref.startswith("#/"), ref
        node = document
        for part in ref[2:].split("/"):
            assert part in node, f"{ref} does not resolve"
            node = node[part]


def test_every_operation_documents_the_server_failing():
    for path, operations in openapi_document()["paths"].items():
        for method, operation in operations.items():
            assert "500" in operation["responses"], (method, path)


def test_method_not_allowed_names_every_method_of_the_path(service, survey):
    for path, allowed in (
        ("/v1/surveys/pulse/respondents/r1", {"GET", "DELETE"}),
        ("/v1/surveys/pulse", {"GET", "PATCH"}),
        ("/v1/surveys", {"GET", "POST"}),
    ):
        reply = service.client.put(path, json={}, headers=service.auth(service.admin))
        assert reply.status_code == 405, (path, reply.text)
        assert set(reply.headers["allow"].split(", ")) == allowed, path
        assert reply.headers["content-type"].startswith("application/problem+json")
