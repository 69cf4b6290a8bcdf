"""The OpenAPI document as the service really answers: problem details for every error,
bearer authentication, and the shape of the ingest batches (read as raw JSON for speed)."""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi

PROBLEM = {
    "type": "object",
    "required": ["title", "status", "detail"],
    "properties": {
        "type": {"type": "string"},
        "title": {"type": "string"},
        "status": {"type": "integer"},
        "detail": {"type": "string"},
        "errors": {
            "type": "array",
            "items": {
                "type": "object",
                "properties": {
                    "index": {"type": ["integer", "null"]},
                    "field": {"type": "string"},
                    "reason": {"type": "string"},
                },
            },
        },
    },
    "additionalProperties": True,
}
ERRORS = {
    "400": "Not JSON",
    "401": "No valid token",
    "403": "A scope is missing",
    "404": "Not found in this project",
    "409": "Conflict",
    "413": "Too large",
    "422": "Invalid input",
    "503": "The store is unreachable; retry",
}
TAGS = {"type": ["object", "null"], "additionalProperties": {"type": "string"}}
PREDICTIONS = {
    "type": "object",
    "required": ["predictions"],
    "properties": {
        "predictions": {
            "type": "array",
            "items": {
                "type": "object",
                "required": ["id", "ts"],
                "properties": {
                    "id": {"type": "string", "minLength": 1, "maxLength": 128},
                    "ts": {"type": "string", "format": "date-time"},
                    "score": {"type": "number", "minimum": 0, "maximum": 1},
                    "scores": {"type": "object", "additionalProperties": {"type": "number"}},
                    "predicted": {"type": ["string", "integer"]},
                    "tags": TAGS,
                },
            },
        }
    },
}
LABELS = {
    "type": "object",
    "required": ["labels"],
    "properties": {
        "labels": {
            "type": "array",
            "items": {
                "type": "object",
                "required": ["id", "actual"],
                "properties": {
                    "id": {"type": "string", "minLength": 1, "maxLength": 128},
                    "actual": {"type": ["string", "integer"]},
                    "ts": {"type": "string", "format": "date-time"},
                },
            },
        }
    },
}


def _problem(description: str) -> dict[str, Any]:
    return {
        "description": description,
        "content": {
            "application/problem+json": {"schema": {"$ref": "#/components/schemas/ProblemDetails"}}
        },
    }


def install(app: FastAPI) -> None:
    """Replace app.openapi with a builder that documents what is served."""

    def build() -> dict[str, Any]:
        if app.openapi_schema:
            return app.openapi_schema
        doc = get_openapi(
            title=app.title, version=app.version, description=app.description, routes=app.routes
        )
        components = doc.setdefault("components", {})
        components.setdefault("schemas", {})["ProblemDetails"] = PROBLEM
        for name in ("HTTPValidationError", "ValidationError"):
            components["schemas"].pop(name, None)
        components["securitySchemes"] = {"bearer": {"type": "http", "scheme": "bearer"}}
        for path, operations in doc.get("paths", {}).items():
            for method, op in operations.items():
                responses = op.setdefault("responses", {})
                if path.startswith("/v1/"):
                    op["security"] = [{"bearer": []}]
                    for code, text in ERRORS.items():
                        responses[code] = _problem(text)
                elif path == "/healthz":
                    responses["503"] = {
                        "description": "The store is down",
                        "content": {"application/json": {"schema": {"type": "object"}}},
                    }
                elif path == "/metrics":
                    responses["401"] = _problem("The token is not valid")
                    responses["403"] = _problem("A scope is missing")
                if method == "post" and path.endswith("/predictions"):
                    op["requestBody"] = {
                        "required": True,
                        "content": {"application/json": {"schema": PREDICTIONS}},
                    }
                if method == "post" and path.endswith("/labels"):
                    op["requestBody"] = {
                        "required": True,
                        "content": {"application/json": {"schema": LABELS}},
                    }
        app.openapi_schema = doc
        return doc

    app.openapi = build  # type: ignore[method-assign]
