"""CDS Hooks over a real socket: discovery, a service call with prefetched Observations, cards,
feedback, and the JWT bearer check ("Trusting CDS Clients", CDS Hooks 2.0.1 / 3.0 ballot).

Key pairs are generated here (EC P-384 for ES384, RSA 2048 for RS384: the algorithms CDS Hooks
recommends); the service reads the public halves from a configuration file, as in production.
Expected interpretations come from the engine on the same Observations, never from numbers
written here. Patients and results are invented (demo data).
"""

from __future__ import annotations

import copy
import json
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import jwt
import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec, rsa

import gasrules
from gasrules.integration.fhir import case_from_fhir
from gasrules.service import cdshooks
from gasrules.service.cdsauth import AuthError, ConfigError, ReplayCache, config_from_dict
from test_service import Server, start

ROOT = Path(__file__).parents[1]
AUD = "https://cds.example.org"  # the service's public base URL (configured)
EHR = "https://ehr.example.org/"  # issuer A: JWKS file, EC key
LAB = "https://lab-portal.example.org"  # issuer B: PEM file, RSA key, restricted
SERVICE = "blood-gas-patient-view"
PANEL = json.loads((ROOT / "tests" / "data" / "fhir" / "arterial_panel.json").read_text())
PATIENT = "pt-0001"  # the Patient in PANEL


@pytest.fixture(scope="module")
def keys(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    d = tmp_path_factory.mktemp("keys")
    ec_key = ec.generate_private_key(ec.SECP384R1())
    rsa_key = rsa.generate_private_key(public_exponent=65537, key_size=2048)
    other = ec.generate_private_key(ec.SECP384R1())
    public_jwk = json.loads(jwt.algorithms.ECAlgorithm.to_jwk(ec_key.public_key()))
    public_jwk.update(kid="ehr-1", use="sig", alg="ES384")
    (d / "ehr.jwks.json").write_text(json.dumps({"keys": [public_jwk]}))
    (d / "lab.pem").write_bytes(
        rsa_key.public_key().public_bytes(
            serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
        )
    )
    config = {
        "audience": AUD,
        "leeway_seconds": 30,
        "max_lifetime_seconds": 300,
        "issuers": {
            EHR: {"jwks_file": "ehr.jwks.json", "jku": [f"{EHR}jwks"]},
            LAB: {
                "pem_file": "lab.pem",
                "kid": "lab-1",
                "sub": ["lab-client"],
                "services": ["some-other-service"],
            },
        },
    }
    (d / "cds-keys.json").write_text(json.dumps(config))
    return {"ec": ec_key, "rsa": rsa_key, "other": other, "config": d / "cds-keys.json"}


@pytest.fixture(scope="module")
def server(keys: dict[str, Any], tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    srv = start(tmp_path_factory.mktemp("cds"), cds_keys=str(keys["config"]))
    yield srv
    srv.close()


@pytest.fixture(scope="module")
def rulebook(server: Server) -> Any:
    """The rulebook the server loaded (the expected results must use the very same one)."""
    return server.app.rulebook


def token(
    keys: dict[str, Any],
    path: str,
    *,
    iss: str = EHR,
    key: str = "ec",
    alg: str = "ES384",
    kid: str | None = "ehr-1",
    headers: dict[str, Any] | None = None,
    drop: tuple[str, ...] = (),
    **claims: Any,
) -> str:
    now = int(time.time())
    payload = {
        "iss": iss,
        "aud": AUD + path,
        "exp": now + 120,
        "iat": now,
        "jti": str(uuid.uuid4()),
        **claims,
    }
    for name in drop:
        payload.pop(name, None)
    head = {"typ": "JWT", **({"kid": kid} if kid else {}), **(headers or {})}
    signing = keys[key] if key in keys else key
    return jwt.encode(payload, signing, algorithm=alg, headers=head)


def call(
    server: Server,
    keys: dict[str, Any],
    method: str,
    path: str,
    body: Any = None,
    bearer: str | None = "auto",
    **kw: Any,
) -> tuple[int, dict[str, str], Any]:
    headers = {}
    if bearer == "auto":
        bearer = token(keys, path)
    if bearer:
        headers["Authorization"] = f"Bearer {bearer}"
    status, hdrs, data = server.call(method, path, body, headers=headers, **kw)
    return status, hdrs, json.loads(data)


def request_body(
    observations: Any, *, patient: Any = None, hook: str = "patient-view", patient_id: str = PATIENT
) -> dict[str, Any]:
    body: dict[str, Any] = {
        "hook": hook,
        "hookInstance": str(uuid.uuid4()),
        "context": {"userId": "Practitioner/example-1", "patientId": patient_id},
        "prefetch": {"observations": observations},
    }
    if patient is not None:
        body["prefetch"]["patient"] = patient
    return body


def searchset(bundle: dict[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(bundle)
    out["type"] = "searchset"
    return out


def spec_style_gas(when: str, ph: float, pco2: float, hco3: float) -> list[dict[str, Any]]:
    """Observations shaped like a FHIR search result (subject Patient/<id>), invented values."""

    def obs(oid: str, code: str, value: float, unit: str) -> dict[str, Any]:
        return {
            "resourceType": "Observation",
            "id": f"{oid}-{when[11:13]}",
            "status": "final",
            "code": {"coding": [{"system": "http://loinc.org", "code": code}]},
            "subject": {"reference": f"Patient/{PATIENT}"},
            "effectiveDateTime": when,
            "valueQuantity": {"value": value, "system": "http://unitsofmeasure.org", "code": unit},
        }

    return [
        obs("ph", "2744-1", ph, "[pH]"),
        obs("pco2", "2019-8", pco2, "mm[Hg]"),
        obs("hco3", "1960-4", hco3, "mmol/L"),
    ]


def bundle_of(resources: list[dict[str, Any]]) -> dict[str, Any]:
    return {"resourceType": "Bundle", "type": "searchset", "entry": [{"resource": r} for r in resources]}


def feedback_lines(server: Server) -> list[dict[str, Any]]:
    return [json.loads(x) for x in Path(server.app.config.feedback_log).read_text().splitlines()]


# ============================================================================ discovery
def test_discovery_lists_the_service_with_prefetch_of_every_loinc_code(
    server: Server, keys: dict[str, Any], rulebook: Any
) -> None:
    status, _, body = call(server, keys, "GET", "/cds-services")
    assert status == 200
    [svc] = body["services"]
    assert (svc["id"], svc["hook"]) == (SERVICE, "patient-view")
    assert svc["description"] and svc["title"]
    assert svc["prefetch"]["patient"] == "Patient/{{context.patientId}}"
    query = svc["prefetch"]["observations"]
    assert query.startswith("Observation?patient={{context.patientId}}&code=")
    for spec in rulebook.inputs.values():
        for code in spec.loinc:
            assert f"http://loinc.org|{code}" in query


def test_discovery_without_a_token_is_401_with_a_bearer_challenge(
    server: Server, keys: dict[str, Any]
) -> None:
    status, headers, body = call(server, keys, "GET", "/cds-services", bearer=None)
    assert status == 401
    assert headers["www-authenticate"].startswith("Bearer ")
    assert body["error"]["code"] == "auth.missing"
    from fhir.resources.R4B.operationoutcome import OperationOutcome

    OperationOutcome.model_validate(body["operationOutcome"])


# ============================================================================ the service call
def test_a_prefetched_panel_gives_one_card_from_the_engine_result(
    server: Server, keys: dict[str, Any], rulebook: Any
) -> None:
    body = request_body(searchset(PANEL))
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", body)
    assert status == 200
    [card] = out["cards"]
    expected = gasrules.interpret(rulebook, case_from_fhir(PANEL, rulebook.inputs).case)
    assert card["summary"] == cdshooks.summary_of(expected["headline"])
    assert len(card["summary"]) < 140
    ranks = {"info": 0, "warning": 1, "critical": 2}
    worst = max((ranks[f["severity"]] for f in expected["findings"]), default=0)
    assert ranks[card["indicator"]] == worst
    assert card["source"]["label"] == f"gasrules rulebook {rulebook.id} {rulebook.version}"
    plain = card["detail"].replace("\\", "")
    for f in expected["findings"]:
        assert f["text"] in plain
    for caution in expected["cautions"]:
        assert caution in plain
    assert "**Results used** (collected 2031-03-14 08:10 UTC)" in plain
    from fhir.resources.R4B.coding import Coding
    from fhir.resources.R4B.observation import Observation

    for reason in card["overrideReasons"]:
        Coding.model_validate(reason)
    [suggestion] = card["suggestions"]
    assert card["selectionBehavior"] == "at-most-one"
    [action] = suggestion["actions"]
    assert action["type"] == "create"
    Observation.model_validate(action["resource"])
    assert action["resource"]["subject"] == {"reference": f"Patient/{PATIENT}"}
    assert action["resource"]["valueString"] == expected["headline"]


def test_the_latest_gas_is_interpreted_and_older_results_are_counted(
    server: Server, keys: dict[str, Any], rulebook: Any
) -> None:
    older = spec_style_gas("2031-03-14T06:00:00Z", 7.40, 40, 24)
    newer = spec_style_gas("2031-03-14T09:30:00Z", 7.31, 31, 15.2)
    body = request_body(
        bundle_of(older + newer),
        patient={"resourceType": "Patient", "id": PATIENT, "birthDate": "1961-07-01"},
    )
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", body)
    assert status == 200
    [card] = out["cards"]
    case = case_from_fhir(newer, rulebook.inputs).case
    expected = gasrules.interpret(rulebook, case)
    assert card["summary"] == cdshooks.summary_of(expected["headline"])
    plain = card["detail"].replace("\\", "")
    assert "collected 2031-03-14 09:30 UTC" in plain
    assert "3 other prefetched result(s)" in plain


def test_a_window_takes_chemistry_drawn_shortly_before(rulebook: Any) -> None:
    gas = spec_style_gas("2031-03-14T09:30:00Z", 7.31, 31, 15.2)
    sodium = {
        **gas[0],
        "id": "na",
        "effectiveDateTime": "2031-03-14T09:10:00Z",
        "code": {"coding": [{"system": "http://loinc.org", "code": "2951-2"}]},
        "valueQuantity": {"value": 139, "system": "http://unitsofmeasure.org", "code": "mmol/L"},
    }
    body = request_body(bundle_of(gas + [sodium]))
    from datetime import timedelta

    none = cdshooks.gather_prefetch(body, PATIENT, rulebook)
    wide = cdshooks.gather_prefetch(body, PATIENT, rulebook, timedelta(minutes=30))
    assert none is not None and wide is not None
    assert sodium not in none.resources and none.left_out == 1
    assert sodium in wide.resources and wide.left_out == 0


def test_a_withdrawn_later_gas_does_not_hide_the_final_one(rulebook: Any) -> None:
    final = spec_style_gas("2031-03-14T06:00:00Z", 7.31, 31, 15.2)
    withdrawn = [
        {**o, "status": "entered-in-error"} for o in spec_style_gas("2031-03-14T09:30:00Z", 7.40, 40, 24)
    ]
    selection = cdshooks.gather_prefetch(request_body(bundle_of(final + withdrawn)), PATIENT, rulebook)
    assert selection is not None
    assert [o["id"] for o in selection.resources] == [o["id"] for o in final]


def test_no_blood_gas_gives_no_cards(server: Server, keys: dict[str, Any]) -> None:
    for observations in (None, bundle_of([])):
        status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", request_body(observations))
        assert (status, out) == (200, {"cards": []})


@pytest.mark.parametrize(
    ("prefetch", "code"),
    [
        ({}, "cds.prefetch_missing"),
        (
            {
                "observations": {
                    "resourceType": "OperationOutcome",
                    "issue": [{"severity": "error", "code": "timeout", "diagnostics": "search timed out"}],
                }
            },
            "cds.prefetch_failed",
        ),
    ],
)
def test_missing_or_failed_prefetch_is_412(
    server: Server, keys: dict[str, Any], prefetch: dict[str, Any], code: str
) -> None:
    body = request_body(None)
    body["prefetch"] = prefetch
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", body)
    assert status == 412 and out["error"]["code"] == code
    from fhir.resources.R4B.operationoutcome import OperationOutcome

    OperationOutcome.model_validate(out["operationOutcome"])


def test_observations_of_another_patient_are_refused(server: Server, keys: dict[str, Any]) -> None:
    body = request_body(
        bundle_of(spec_style_gas("2031-03-14T09:30:00Z", 7.31, 31, 15.2)), patient_id="someone-else"
    )
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", body)
    assert status == 400 and out["error"]["code"] == "cds.wrong_patient"


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"hook": "order-sign"}, "hook"),
        ({"hookInstance": "not-a-uuid"}, "hookInstance"),
        ({"context": {"userId": "Practitioner/1"}}, "context.patientId"),
        ({"fhirAuthorization": {"access_token": "x"}}, "fhirServer"),
    ],
)
def test_a_malformed_request_is_400_naming_the_field(
    server: Server, keys: dict[str, Any], change: dict[str, Any], field: str
) -> None:
    body = {**request_body(None), **change}
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", body)
    assert status == 400 and out["error"]["field"] == field


# ============================================================================ feedback
def _card(server: Server, keys: dict[str, Any]) -> dict[str, Any]:
    _, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", request_body(searchset(PANEL)))
    return out["cards"][0]


def test_feedback_is_recorded_against_the_rule_ids_of_the_card(
    server: Server, keys: dict[str, Any], rulebook: Any
) -> None:
    card = _card(server, keys)
    issued = [r for r in feedback_lines(server) if r.get("card") == card["uuid"]]
    assert [r["type"] for r in issued] == ["card"]
    expected = gasrules.interpret(rulebook, case_from_fhir(PANEL, rulebook.inputs).case)
    finding_rules = [f["rule"] for f in expected["findings"]]
    assert issued[0]["rules"][: len(finding_rules)] == list(dict.fromkeys(finding_rules))
    path = f"/cds-services/{SERVICE}/feedback"
    suggestion = card["suggestions"][0]["uuid"]
    fb = {
        "feedback": [
            {
                "card": card["uuid"],
                "outcome": "overridden",
                "outcomeTimestamp": "2031-03-14T08:40:12Z",
                "overrideReason": {
                    "reason": card["overrideReasons"][0],
                    "userComment": "Sample known to be venous.",
                },
            },
            {
                "card": card["uuid"],
                "outcome": "accepted",
                "outcomeTimestamp": "2031-03-14T08:41:00Z",
                "acceptedSuggestions": [{"id": suggestion}],
            },
        ]
    }
    status, _, out = call(server, keys, "POST", path, fb)
    assert status == 200 and out["recorded"] == 2
    assert set(out["rules"]) == set(issued[0]["rules"])
    records = [r for r in feedback_lines(server) if r.get("card") == card["uuid"] and r["type"] == "feedback"]
    assert [r["outcome"] for r in records] == ["overridden", "accepted"]
    for r in records:
        assert r["rules"] == issued[0]["rules"] and r["card_known"] is True
        assert r["rulebook"] == rulebook.identity and r["client"]["iss"] == EHR
    assert records[0]["overrideReason"]["reason"]["code"] == "sample-problem"
    assert records[1]["acceptedSuggestions"] == [suggestion]


def test_feedback_for_an_unknown_card_is_kept_and_marked(server: Server, keys: dict[str, Any]) -> None:
    unknown = str(uuid.uuid4())
    fb = {
        "feedback": [{"card": unknown, "outcome": "overridden", "outcomeTimestamp": "2031-03-14T08:40:12Z"}]
    }
    status, _, _ = call(server, keys, "POST", f"/cds-services/{SERVICE}/feedback", fb)
    assert status == 200
    [rec] = [r for r in feedback_lines(server) if r.get("card") == unknown]
    assert rec["card_known"] is False and rec["rules"] == []


@pytest.mark.parametrize(
    ("entry", "field"),
    [
        ({"outcome": "accepted"}, "feedback[0].acceptedSuggestions"),
        (
            {"outcome": "accepted", "acceptedSuggestions": [{"id": "not-on-this-card"}]},
            "feedback[0].acceptedSuggestions",
        ),
        ({"outcome": "ignored"}, "feedback[0].outcome"),
        ({"outcomeTimestamp": "yesterday"}, "feedback[0].outcomeTimestamp"),
        ({"outcomeTimestamp": "2031-03-14T08:40:12"}, "feedback[0].outcomeTimestamp"),
    ],
)
def test_bad_feedback_is_400_and_nothing_is_recorded(
    server: Server, keys: dict[str, Any], entry: dict[str, Any], field: str
) -> None:
    card = _card(server, keys)
    before = len(feedback_lines(server))
    fb = {
        "feedback": [
            {
                "card": card["uuid"],
                "outcome": "overridden",
                "outcomeTimestamp": "2031-03-14T08:40:12Z",
                **entry,
            }
        ]
    }
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}/feedback", fb)
    assert status == 400 and out["error"]["field"] == field
    assert len(feedback_lines(server)) == before


def test_cards_are_known_again_after_a_restart(server: Server, keys: dict[str, Any], tmp_path: Path) -> None:
    card = _card(server, keys)
    from gasrules.service.handlers import App, ServiceConfig

    again = App(ServiceConfig(feedback_log=server.app.config.feedback_log), server.app.interpreter)
    assert again.cards.get(card["uuid"]) == server.app.cards.get(card["uuid"])


# ============================================================================ the JWT check
def test_feedback_accepts_its_own_url_or_its_service_url_as_aud(server: Server, keys: dict[str, Any]) -> None:
    path = f"/cds-services/{SERVICE}/feedback"
    fb = {
        "feedback": [
            {"card": str(uuid.uuid4()), "outcome": "overridden", "outcomeTimestamp": "2031-03-14T08:40:12Z"}
        ]
    }
    for aud in (AUD + path, AUD + f"/cds-services/{SERVICE}"):
        assert call(server, keys, "POST", path, fb, bearer=token(keys, path, aud=aud))[0] == 200
    status, _, out = call(server, keys, "POST", path, fb, bearer=token(keys, path, aud=AUD + "/cds-services"))
    assert status == 401 and out["error"]["code"] == "auth.audience"


def test_rs384_from_a_pem_configured_issuer_is_checked_then_forbidden(
    server: Server, keys: dict[str, Any]
) -> None:
    path = f"/cds-services/{SERVICE}"
    good = token(keys, path, iss=LAB, key="rsa", alg="RS384", kid="lab-1", sub="lab-client")
    status, _, out = call(server, keys, "POST", path, request_body(None), bearer=good)
    assert status == 403 and "may not call service" in out["error"]["message"]
    wrong_sub = token(keys, "/cds-services", iss=LAB, key="rsa", alg="RS384", kid="lab-1", sub="someone")
    status, _, out = call(server, keys, "GET", "/cds-services", bearer=wrong_sub)
    assert status == 403 and out["error"]["message"].startswith("sub 'someone'")
    right = token(keys, "/cds-services", iss=LAB, key="rsa", alg="RS384", kid="lab-1", sub="lab-client")
    assert call(server, keys, "GET", "/cds-services", bearer=right)[0] == 200


def _hs256(keys: dict[str, Any]) -> str:
    now = int(time.time())
    return jwt.encode(
        {"iss": EHR, "aud": AUD + "/cds-services", "exp": now + 60, "iat": now, "jti": "h"},
        "shared-secret-shared-secret-shared",
        algorithm="HS256",
        headers={"kid": "ehr-1", "typ": "JWT"},
    )


def _none_alg() -> str:
    import base64

    def b64(d: dict[str, Any]) -> str:
        return base64.urlsafe_b64encode(json.dumps(d).encode()).rstrip(b"=").decode()

    now = int(time.time())
    return (
        b64({"alg": "none", "typ": "JWT", "kid": "ehr-1"})
        + "."
        + b64({"iss": EHR, "aud": AUD + "/cds-services", "exp": now + 60, "iat": now, "jti": "n"})
        + "."
    )


@pytest.mark.parametrize(
    ("make", "code"),
    [
        (lambda k: token(k, "/cds-services", exp=int(time.time()) - 120), "auth.expired"),
        (
            lambda k: token(k, "/cds-services", iat=int(time.time()) + 600, exp=int(time.time()) + 700),
            "auth.not_yet_valid",
        ),
        (
            lambda k: token(k, "/cds-services", aud="https://elsewhere.example.org/cds-services"),
            "auth.audience",
        ),
        (lambda k: token(k, "/cds-services", exp=int(time.time()) + 3600), "auth.lifetime"),
        (lambda k: token(k, "/cds-services", drop=("jti",)), "auth.claims"),
        (lambda k: token(k, "/cds-services", drop=("iat",)), "auth.claims"),
        (lambda k: token(k, "/cds-services", iss="https://unknown.example.org"), "auth.issuer"),
        (lambda k: token(k, "/cds-services", kid="ehr-9"), "auth.kid"),
        (lambda k: token(k, "/cds-services", kid=None), "auth.header"),
        (lambda k: token(k, "/cds-services", key="other"), "auth.invalid"),
        (lambda k: token(k, "/cds-services", headers={"typ": "at+jwt"}), "auth.header"),
        (lambda k: token(k, "/cds-services", headers={"jku": "https://evil.example.org/jwks"}), "auth.jku"),
        (lambda k: token(k, "/cds-services", key="rsa", alg="RS256"), "auth.algorithm"),
        (_hs256, "auth.algorithm"),
        (lambda k: _none_alg(), "auth.algorithm"),
        (lambda k: "not.a.jwt", "auth.malformed"),
    ],
)
def test_bad_tokens_are_401_with_a_reason(server: Server, keys: dict[str, Any], make: Any, code: str) -> None:
    status, headers, out = call(server, keys, "GET", "/cds-services", bearer=make(keys))
    assert status == 401, out
    assert out["error"]["code"] == code
    assert "invalid_token" in headers["www-authenticate"]


def test_a_jwk_used_with_another_algorithm_than_its_own_is_refused(keys: dict[str, Any]) -> None:
    from gasrules.service.cdsauth import TokenVerifier

    rsa_jwk = json.loads(jwt.algorithms.RSAAlgorithm.to_jwk(keys["rsa"].public_key()))
    rsa_jwk.update(kid="r1", alg="RS384")
    config = config_from_dict(
        {"algorithms": ["RS384", "PS384"], "issuers": {EHR: {"jwks": {"keys": [rsa_jwk]}}}}
    )
    verifier = TokenVerifier(config, AUD)
    ok = token(keys, "/cds-services", key="rsa", alg="RS384", kid="r1")
    assert verifier.verify(f"Bearer {ok}", "/cds-services", None)["iss"] == EHR
    other = token(keys, "/cds-services", key="rsa", alg="PS384", kid="r1")
    with pytest.raises(AuthError) as exc:
        verifier.verify(f"Bearer {other}", "/cds-services", None)
    assert exc.value.code == "auth.algorithm" and "is for RS384" in exc.value.message


def test_a_replayed_token_is_refused(server: Server, keys: dict[str, Any]) -> None:
    once = token(keys, "/cds-services")
    assert call(server, keys, "GET", "/cds-services", bearer=once)[0] == 200
    status, _, out = call(server, keys, "GET", "/cds-services", bearer=once)
    assert status == 401 and out["error"]["code"] == "auth.replay"


def test_a_configured_jku_and_a_small_clock_skew_are_accepted(server: Server, keys: dict[str, Any]) -> None:
    ok = token(
        keys,
        "/cds-services",
        headers={"jku": f"{EHR}jwks"},
        exp=int(time.time()) - 10,
        iat=int(time.time()) - 70,
    )  # 10 s late < 30 s leeway
    assert call(server, keys, "GET", "/cds-services", bearer=ok)[0] == 200


def test_json_api_is_not_behind_the_cds_token(server: Server) -> None:
    assert server.json("GET", "/health")[1]["cds_auth"] == "jwt"


# ============================================================================ units
def test_replay_cache_forgets_expired_nonces_and_refuses_when_full() -> None:
    cache = ReplayCache(max_entries=2)
    assert cache.add("i", "a", until=100, now=0)
    assert not cache.add("i", "a", until=100, now=50)
    assert cache.add("i", "a", until=300, now=150)  # expired at 100: usable again
    assert cache.add("i", "b", until=300, now=150)
    with pytest.raises(AuthError) as exc:
        cache.add("i", "c", until=300, now=160)
    assert exc.value.status == 503


@pytest.mark.parametrize(
    ("config", "where"),
    [
        ({"algorithms": ["HS256"], "issuers": {"x": {"pem_file": "k.pem"}}}, "$.algorithms"),
        ({"algorithms": ["none"], "issuers": {"x": {"pem_file": "k.pem"}}}, "$.algorithms"),
        ({"issuers": {}}, "$.issuers"),
        ({"issuers": {"x": {}}}, "$.issuers['x']"),
        (
            {"issuers": {"x": {"jwks": {"keys": [{"kty": "EC", "kid": "k", "d": "secret"}]}}}},
            "$.issuers['x'].jwks.keys[0]",
        ),
        ({"leeway_seconds": -1, "issuers": {"x": {}}}, "$.leeway_seconds"),
        ({"audience": "cds.example.org", "issuers": {"x": {}}}, "$.audience"),
    ],
)
def test_key_configuration_errors_name_the_path(config: dict[str, Any], where: str) -> None:
    with pytest.raises(ConfigError) as exc:
        config_from_dict(config, origin="keys.json")
    assert f"keys.json: {where}" in str(exc.value)


def test_summary_is_cut_at_a_clause_under_140_characters() -> None:
    headline = "; ".join(f"Finding number {i} with some words" for i in range(8))
    summary = cdshooks.summary_of(headline)
    assert len(summary) < 140 and summary.endswith("…")
    assert headline.startswith(summary[:-1])
    assert summary[:-1].endswith("words")
    assert cdshooks.summary_of("Short one") == "Short one"


def test_cds_calls_are_decision_records_without_the_patient_id(tmp_path: Path) -> None:
    log = tmp_path / "decisions.jsonl"
    srv = start(tmp_path, {"GASRULES_DECISION_LOG": str(log), "GASRULES_LOG_FSYNC": "0"})
    try:
        body = request_body(searchset(PANEL))
        status, out = srv.json("POST", f"/cds-services/{SERVICE}", body)
        assert status == 200 and out["cards"]
    finally:
        srv.close()
        srv.app.close()
    [entry] = [json.loads(x) for x in log.read_text().splitlines()]
    text = json.dumps(entry)
    assert body["hookInstance"] in text  # the card can be traced to its decision record
    assert PATIENT not in text  # patient_id dropped by the default context policy


def test_cds_responses_match_the_openapi_schemas(server: Server, keys: dict[str, Any]) -> None:
    from test_service import _openapi_validator

    _, doc = server.json("GET", "/openapi.json")
    status, _, out = call(server, keys, "POST", f"/cds-services/{SERVICE}", request_body(searchset(PANEL)))
    assert status == 200
    _openapi_validator(doc, "CdsResponse").validate(out)
    fb = {
        "feedback": [
            {
                "card": out["cards"][0]["uuid"],
                "outcome": "overridden",
                "outcomeTimestamp": "2031-03-14T08:40:12Z",
            }
        ]
    }
    _openapi_validator(doc, "CdsFeedback").validate(fb)
    status, _, ack = call(server, keys, "POST", f"/cds-services/{SERVICE}/feedback", fb)
    assert status == 200
    _openapi_validator(doc, "CdsFeedbackAck").validate(ack)
    _openapi_validator(doc, "Error").validate(call(server, keys, "GET", "/cds-services", bearer=None)[2])


def test_discovery_can_be_left_open_by_configuration(keys: dict[str, Any], tmp_path: Path) -> None:
    config = json.loads(keys["config"].read_text())
    config["protect_discovery"] = False
    for name in ("ehr.jwks.json", "lab.pem"):
        (tmp_path / name).write_bytes((keys["config"].parent / name).read_bytes())
    (tmp_path / "keys.json").write_text(json.dumps(config))
    srv = start(tmp_path, cds_keys=str(tmp_path / "keys.json"))
    try:
        assert srv.call("GET", "/cds-services")[0] == 200
        status, _, _ = srv.call("POST", f"/cds-services/{SERVICE}", request_body(None))
        assert status == 401  # the services themselves still need a token
    finally:
        srv.close()
