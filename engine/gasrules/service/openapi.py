"""The OpenAPI 3.1 description of `gasrules serve` (served at /openapi.json).

Schemas are JSON Schema 2020-12 (OpenAPI 3.1 uses it as is): the case and result schemas are the
project's own files under schemas/; the CDS Hooks shapes follow CDS Hooks 2.0.1 (discovery,
request, card, feedback). The service's tests validate real responses against these schemas, so
the description cannot drift from the behaviour unnoticed.
"""

from __future__ import annotations

import json
from typing import Any

from gasrules.core.version import __version__

__all__ = ["ERROR_STATUSES", "openapi_document"]

ERROR_STATUSES = {
    "400": "Bad request: not JSON, or a field is missing or malformed (error.field names it)",
    "401": "Missing, invalid, expired or replayed bearer JWT (CDS Hooks endpoints only)",
    "403": "Valid JWT, but the client may not call this service (sub, tenant or service list)",
    "404": "No such endpoint or CDS service",
    "405": "Method not allowed (the Allow header lists the allowed ones)",
    "408": "The body was not received within the timeout",
    "411": "Content-Length missing (chunked bodies are not accepted)",
    "412": "CDS Hooks: the prefetch the service needs was not provided",
    "413": "Body larger than the size limit, or a batch with too many cases",
    "415": "Content-Type not accepted for this endpoint",
    "500": "Internal error (details in the service log)",
    "503": "Busy (connection limit, replay cache full, or a batch past the timeout); retry",
}


def _schema_file(name: str) -> dict[str, Any]:
    from gasrules.core.resources import schema_path

    data = json.loads(schema_path(name).read_text(encoding="utf-8"))
    data.pop("$schema", None)
    data.pop("$id", None)
    return data


def _ref(name: str) -> dict[str, str]:
    return {"$ref": f"#/components/schemas/{name}"}


def _json(schema: dict[str, Any], media: str = "application/json") -> dict[str, Any]:
    return {"content": {media: {"schema": schema}}}


def _errors(*codes: str) -> dict[str, Any]:
    return {c: {"description": ERROR_STATUSES[c], **_json(_ref("Error"))} for c in codes}


def _components() -> dict[str, Any]:
    string = {"type": "string"}
    coding = {
        "type": "object",
        "required": ["code"],
        "properties": {"system": string, "code": string, "display": string},
    }
    card = {
        "type": "object",
        "required": ["summary", "indicator", "source"],
        "properties": {
            "uuid": string,
            "summary": {"type": "string", "maxLength": 139},
            "detail": {"type": "string", "description": "GitHub-flavoured Markdown"},
            "indicator": {"enum": ["info", "warning", "critical"]},
            "source": {
                "type": "object",
                "required": ["label"],
                "properties": {"label": string, "url": string, "icon": string, "topic": _ref("Coding")},
            },
            "suggestions": {
                "type": "array",
                "items": {
                    "type": "object",
                    "required": ["label"],
                    "properties": {
                        "label": string,
                        "uuid": string,
                        "isRecommended": {"type": "boolean"},
                        "actions": {
                            "type": "array",
                            "items": {
                                "type": "object",
                                "required": ["type", "description"],
                                "properties": {
                                    "type": {"enum": ["create", "update", "delete"]},
                                    "description": string,
                                    "resource": {"type": "object"},
                                    "resourceId": string,
                                },
                            },
                        },
                    },
                },
            },
            "selectionBehavior": {"enum": ["at-most-one", "any"]},
            "overrideReasons": {"type": "array", "items": _ref("Coding")},
            "links": {"type": "array", "items": {"type": "object"}},
        },
    }
    return {
        "Case": _schema_file("case.schema.json"),
        "Result": _schema_file("result.schema.json"),
        "FhirResource": {
            "type": "object",
            "required": ["resourceType"],
            "properties": {"resourceType": string},
        },
        "FhirBundle": {
            "type": "object",
            "required": ["resourceType", "type", "entry"],
            "properties": {
                "resourceType": {"const": "Bundle"},
                "type": string,
                "entry": {
                    "type": "array",
                    "items": {
                        "type": "object",
                        "required": ["resource"],
                        "properties": {"fullUrl": string, "resource": _ref("FhirResource")},
                    },
                },
            },
        },
        "Error": {
            "type": "object",
            "required": ["error"],
            "properties": {
                "error": {
                    "type": "object",
                    "required": ["code", "message"],
                    "properties": {"code": string, "message": string, "field": string},
                },
                "operationOutcome": {
                    "type": "object",
                    "description": "CDS Hooks endpoints: the same error as a FHIR OperationOutcome",
                },
            },
        },
        "Health": {
            "type": "object",
            "required": ["status", "rulebook", "engine_version", "runtime", "cds_auth"],
            "properties": {
                "status": {"const": "ok"},
                "rulebook": {
                    "type": "object",
                    "required": ["id", "version", "sha256"],
                    "properties": {
                        "id": string,
                        "version": string,
                        "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
                    },
                },
                "engine_version": string,
                "uptime_seconds": {"type": "number"},
                "runtime": {"type": "object"},
                "cds_auth": {"enum": ["jwt", "off"]},
                "limits": {"type": "object"},
            },
        },
        "Ready": {
            "type": "object",
            "required": ["status", "rulebook", "admitted"],
            "properties": {
                "status": {"const": "ready"},
                "rulebook": {"type": "object", "required": ["id", "version", "sha256"]},
                "admitted": {"type": "object"},
            },
        },
        "Coding": coding,
        "CdsDiscovery": {
            "type": "object",
            "required": ["services"],
            "properties": {
                "services": {
                    "type": "array",
                    "items": {
                        "type": "object",
                        "required": ["hook", "description", "id"],
                        "properties": {
                            "hook": string,
                            "title": string,
                            "description": string,
                            "id": string,
                            "usageRequirements": string,
                            "version": string,
                            "prefetch": {"type": "object", "additionalProperties": string},
                        },
                    },
                }
            },
        },
        "CdsRequest": {
            "type": "object",
            "required": ["hook", "hookInstance", "context"],
            "properties": {
                "hook": string,
                "hookInstance": {"type": "string", "format": "uuid"},
                "fhirServer": string,
                "fhirAuthorization": {"type": "object"},
                "context": {"type": "object", "required": ["patientId"]},
                "prefetch": {
                    "type": "object",
                    "properties": {
                        "patient": {"type": ["object", "null"]},
                        "observations": {
                            "type": ["object", "null"],
                            "description": "searchset Bundle of Observations",
                        },
                    },
                },
            },
        },
        "CdsCard": card,
        "CdsResponse": {
            "type": "object",
            "required": ["cards"],
            "properties": {
                "cards": {"type": "array", "items": _ref("CdsCard")},
                "systemActions": {"type": "array", "items": {"type": "object"}},
            },
        },
        "CdsFeedback": {
            "type": "object",
            "required": ["feedback"],
            "properties": {
                "feedback": {
                    "type": "array",
                    "minItems": 1,
                    "items": {
                        "type": "object",
                        "required": ["card", "outcome", "outcomeTimestamp"],
                        "properties": {
                            "card": string,
                            "outcome": {"enum": ["accepted", "overridden"]},
                            "acceptedSuggestions": {
                                "type": "array",
                                "items": {"type": "object", "required": ["id"], "properties": {"id": string}},
                            },
                            "overrideReason": {
                                "type": "object",
                                "properties": {"reason": _ref("Coding"), "userComment": string},
                            },
                            "outcomeTimestamp": {"type": "string", "format": "date-time"},
                        },
                    },
                }
            },
        },
        "CdsFeedbackAck": {
            "type": "object",
            "required": ["recorded", "rules"],
            "properties": {
                "recorded": {"type": "integer", "minimum": 1},
                "rules": {"type": "array", "items": string},
            },
        },
    }


def openapi_document(rulebook: Any) -> dict[str, Any]:
    """The description for a service running ``rulebook``."""
    flag = {"type": "string", "enum": ["0", "1"]}
    trace = {
        "name": "trace",
        "in": "query",
        "schema": flag,
        "description": "1 (default): include the rule trace; 0: leave it out",
    }
    cds_security = [{"cdsJwt": []}]
    service_id = {
        "name": "id",
        "in": "path",
        "required": True,
        "schema": {"type": "string"},
        "description": "a service id from GET /cds-services",
    }
    paths: dict[str, Any] = {
        "/interpret": {
            "post": {
                "summary": "Interpret one case (or one FHIR Bundle of Observations)",
                "parameters": [
                    trace,
                    {
                        "name": "fhir",
                        "in": "query",
                        "schema": flag,
                        "description": "1: answer with a FHIR Bundle even for a plain case",
                    },
                    {
                        "name": "preliminary",
                        "in": "query",
                        "schema": flag,
                        "description": "FHIR input: 1 uses preliminary results too",
                    },
                ],
                "requestBody": {
                    "required": True,
                    "content": {
                        "application/json": {
                            "schema": {
                                "oneOf": [
                                    _ref("Case"),
                                    _ref("FhirResource"),
                                    {"type": "array", "items": _ref("FhirResource")},
                                ]
                            }
                        },
                        "application/fhir+json": {"schema": _ref("FhirResource")},
                    },
                },
                "responses": {
                    "200": {
                        "description": "The result contract (status rejected names each bad field); a "
                        "FHIR Bundle (application/fhir+json) for FHIR input or fhir=1",
                        "content": {
                            "application/json": {"schema": _ref("Result")},
                            "application/fhir+json": {"schema": _ref("FhirBundle")},
                        },
                    },
                    **_errors("400", "408", "411", "413", "415", "500", "503"),
                },
            }
        },
        "/interpret/batch": {
            "post": {
                "summary": "Interpret many cases: N in, N out, in order, errors inline",
                "parameters": [trace],
                "requestBody": {
                    "required": True,
                    "content": {
                        "application/json": {"schema": {"type": "array", "items": _ref("Case")}},
                        "application/x-ndjson": {
                            "schema": {"type": "string", "description": "one case per line"}
                        },
                    },
                },
                "responses": {
                    "200": {
                        "description": "One result per case, same order and format as the request",
                        "content": {
                            "application/json": {"schema": {"type": "array", "items": _ref("Result")}},
                            "application/x-ndjson": {"schema": {"type": "string"}},
                        },
                    },
                    **_errors("400", "408", "411", "413", "415", "500", "503"),
                },
            }
        },
        "/health": {
            "get": {
                "summary": "Rulebook identity, engine version and settings in force",
                "responses": {
                    "200": {"description": "Service is up", **_json(_ref("Health"))},
                    **_errors("500", "503"),
                },
            }
        },
        "/ready": {
            "get": {
                "summary": "Readiness: the rulebook is loaded and admitted and the service accepts "
                "requests (never held up by the concurrency limit)",
                "responses": {"200": {"description": "Ready", **_json(_ref("Ready"))}, **_errors("503")},
            }
        },
        "/metrics": {
            "get": {
                "summary": "Prometheus text exposition: requests, latency histogram, cases by "
                "status, rulebook identity",
                "responses": {
                    "200": {
                        "description": "Metrics",
                        "content": {"text/plain": {"schema": {"type": "string"}}},
                    }
                },
            }
        },
        "/openapi.json": {
            "get": {
                "summary": "This description",
                "responses": {"200": {"description": "OpenAPI 3.1 document", **_json({"type": "object"})}},
            }
        },
        "/cds-services": {
            "get": {
                "summary": "CDS Hooks discovery",
                "security": cds_security,
                "responses": {
                    "200": {"description": "The CDS services offered", **_json(_ref("CdsDiscovery"))},
                    **_errors("401", "403", "500", "503"),
                },
            }
        },
        "/cds-services/{id}": {
            "post": {
                "summary": "CDS Hooks service call: prefetched Observations in, cards out",
                "security": cds_security,
                "parameters": [service_id],
                "requestBody": {"required": True, **_json(_ref("CdsRequest"))},
                "responses": {
                    "200": {
                        "description": "Cards (empty when there is no blood gas)",
                        **_json(_ref("CdsResponse")),
                    },
                    **_errors("400", "401", "403", "404", "408", "411", "412", "413", "415", "500", "503"),
                },
            }
        },
        "/cds-services/{id}/feedback": {
            "post": {
                "summary": "CDS Hooks feedback: accepted or overridden cards, recorded against rule ids",
                "security": cds_security,
                "parameters": [service_id],
                "requestBody": {"required": True, **_json(_ref("CdsFeedback"))},
                "responses": {
                    "200": {"description": "Recorded", **_json(_ref("CdsFeedbackAck"))},
                    **_errors("400", "401", "403", "404", "408", "411", "413", "415", "500", "503"),
                },
            }
        },
    }
    for item in paths.values():
        for op in item.values():
            op["responses"].setdefault("405", {"description": ERROR_STATUSES["405"], **_json(_ref("Error"))})
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "gasrules service",
            "version": __version__,
            "description": "Blood gas interpretation driven by a versioned rulebook "
            f"(running: {rulebook.id} {rulebook.version}). Decision "
            "support only: it supports, and never replaces, clinical "
            "judgement; local laboratory ranges and protocols prevail.",
        },
        "jsonSchemaDialect": "https://json-schema.org/draft/2020-12/schema",
        "paths": paths,
        "components": {
            "schemas": _components(),
            "securitySchemes": {
                "cdsJwt": {
                    "type": "http",
                    "scheme": "bearer",
                    "bearerFormat": "JWT",
                    "description": "CDS Hooks client JWT (asymmetric alg, kid, iss, aud = the "
                    "endpoint URL, exp, iat, jti); required when the service runs "
                    "with a key configuration",
                }
            },
        },
    }
