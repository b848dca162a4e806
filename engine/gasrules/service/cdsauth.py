"""JWT bearer check for CDS Hooks calls ("Trusting CDS Clients", CDS Hooks 2.0 / 3.0 ballot).

A CDS client (an EHR) signs a short-lived JWT with its private key and sends it as
``Authorization: Bearer <jwt>`` on every call (discovery, service, feedback). This module checks:

* the header: ``alg`` on the allow-list (asymmetric only: never ``none``, never HMAC), ``typ``
  ``JWT``, ``kid`` present; a ``jku``, when sent, must be one configured for that issuer (the
  service never fetches keys from the network: keys come from configuration);
* the signature, with the issuer's key named by ``kid`` (a JWKS file, inline JWKS, or PEM);
* the claims ``iss`` (a configured issuer), ``aud`` (the URL of the endpoint being called),
  ``exp`` and ``iat`` (with a small leeway; ``iat`` not in the future; lifetime capped), ``jti``
  (a nonce: a second use within its lifetime is a replay); optional ``sub`` and ``tenant``
  allow-lists and a per-issuer list of services.

Failures raise :class:`AuthError` with the HTTP status to send: 401 (no, bad or replayed token),
403 (a good token from a client not allowed this service or tenant), 503 (the replay cache is
full: refusing is safer than forgetting a nonce).

Configuration (JSON or YAML), paths relative to the file::

    {"audience": "https://cds.example.org",        # public base URL; aud = base + endpoint path
     "algorithms": ["ES384", "RS384"],             # optional subset of ASYMMETRIC_ALGORITHMS
     "leeway_seconds": 30, "max_lifetime_seconds": 300, "protect_discovery": true,
     "issuers": {"https://ehr.example.org/": {
         "jwks_file": "ehr.jwks.json",             # or "jwks": {...}, or "pem_file" (+ "kid"),
                                                   # or "keys": [{"kid": ..., "pem_file": ...}]
         "jku": ["https://ehr.example.org/jwks"],  # allowed jku header values (optional)
         "sub": ["ehr-client"], "tenants": ["t1"], "services": ["blood-gas-patient-view"]}}}
"""

from __future__ import annotations

import heapq
import json
import threading
import time
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError

__all__ = [
    "ASYMMETRIC_ALGORITHMS",
    "AuthConfig",
    "AuthError",
    "ConfigError",
    "Issuer",
    "ReplayCache",
    "TokenVerifier",
    "load_config",
]

# Signature algorithms that need no shared secret (RFC 7518 3.3-3.5, RFC 8037). CDS Hooks: SHALL
# NOT use none or any symmetric algorithm; ES384 and RS384 are RECOMMENDED.
ASYMMETRIC_ALGORITHMS = (
    "ES256",
    "ES384",
    "ES512",
    "RS256",
    "RS384",
    "RS512",
    "PS256",
    "PS384",
    "PS512",
    "EdDSA",
)
DEFAULT_ALGORITHMS = ("ES384", "RS384")
REQUIRED_CLAIMS = ("iss", "aud", "exp", "iat", "jti")


class ConfigError(EngineError, ValueError):
    """The key configuration is unusable; the message names the file and the JSON path."""


class AuthError(EngineError):
    """A request that fails the bearer check; ``status`` is the HTTP status to answer with."""

    def __init__(self, status: int, code: str, message: str) -> None:
        super().__init__(message)
        self.status, self.code, self.message = status, code, message


@dataclass(frozen=True)
class Issuer:
    iss: str
    keys: Mapping[str, Any]  # kid -> public key object ("*" = any kid, one PEM)
    key_algs: Mapping[str, str] = field(default_factory=dict)  # kid -> the JWK's own "alg"
    jku: tuple[str, ...] = ()
    subjects: tuple[str, ...] | None = None
    tenants: tuple[str, ...] | None = None
    services: tuple[str, ...] | None = None


@dataclass(frozen=True)
class AuthConfig:
    issuers: Mapping[str, Issuer]
    audience: str | None = None
    algorithms: tuple[str, ...] = DEFAULT_ALGORITHMS
    leeway_seconds: float = 30.0
    max_lifetime_seconds: float = 300.0
    protect_discovery: bool = True
    replay_cache_size: int = 100_000


# ============================================================================ configuration
def load_config(path: str | Path) -> AuthConfig:
    """Read a key configuration file (JSON, or YAML by extension)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read CDS key configuration ({exc.strerror})") from None
    try:
        if path.suffix.lower() in (".yaml", ".yml"):
            import yaml

            raw = yaml.safe_load(text)
        else:
            raw = json.loads(text)
    except Exception as exc:
        raise ConfigError(f"{path}: not valid {path.suffix.lstrip('.') or 'JSON'}: {exc}") from None
    return config_from_dict(raw, base=path.parent, origin=str(path))


def config_from_dict(raw: Any, *, base: Path = Path("."), origin: str = "<config>") -> AuthConfig:
    def fail(where: str, what: str) -> ConfigError:
        return ConfigError(f"{origin}: {where}: {what}")

    if not isinstance(raw, dict):
        raise fail("$", "expected an object with 'issuers'")
    unknown = set(raw) - {
        "audience",
        "algorithms",
        "leeway_seconds",
        "max_lifetime_seconds",
        "protect_discovery",
        "replay_cache_size",
        "issuers",
    }
    if unknown:
        raise fail("$", f"unknown keys {sorted(unknown)}")
    algorithms = tuple(raw.get("algorithms") or DEFAULT_ALGORITHMS)
    bad = [a for a in algorithms if a not in ASYMMETRIC_ALGORITHMS]
    if bad:
        raise fail(
            "$.algorithms",
            f"{bad} not allowed; accepted: {', '.join(ASYMMETRIC_ALGORITHMS)}"
            " (none and HMAC are forbidden by CDS Hooks)",
        )
    numbers = {}
    for key, default, low, high in (
        ("leeway_seconds", 30.0, 0, 300),
        ("max_lifetime_seconds", 300.0, 1, 86_400),
        ("replay_cache_size", 100_000, 100, 10_000_000),
    ):
        value = raw.get(key, default)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not low <= value <= high:
            raise fail(f"$.{key}", f"{value!r} is not a number in [{low}, {high}]")
        numbers[key] = value
    audience = raw.get("audience")
    if audience is not None and (
        not isinstance(audience, str) or not audience.startswith(("https://", "http://"))
    ):
        raise fail("$.audience", f"{audience!r} is not an http(s) URL")
    issuers_raw = raw.get("issuers")
    if not isinstance(issuers_raw, dict) or not issuers_raw:
        raise fail("$.issuers", "expected an object of issuer -> keys, with at least one issuer")
    issuers = {
        iss: _issuer(iss, spec, base, lambda w, m, i=iss: fail(f"$.issuers[{i!r}]{w}", m))
        for iss, spec in issuers_raw.items()
    }
    protect = raw.get("protect_discovery", True)
    if not isinstance(protect, bool):
        raise fail("$.protect_discovery", "expected true or false")
    return AuthConfig(
        issuers=issuers,
        audience=audience.rstrip("/") if audience else None,
        algorithms=algorithms,
        leeway_seconds=float(numbers["leeway_seconds"]),
        max_lifetime_seconds=float(numbers["max_lifetime_seconds"]),
        protect_discovery=protect,
        replay_cache_size=int(numbers["replay_cache_size"]),
    )


def _strings(value: Any, where: str, fail: Any) -> tuple[str, ...] | None:
    if value is None:
        return None
    if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
        raise fail(where, "expected a list of non-empty strings")
    return tuple(value)


def _issuer(iss: str, spec: Any, base: Path, fail: Any) -> Issuer:
    if not isinstance(spec, dict):
        raise fail("", "expected an object with jwks_file, jwks, pem_file or keys")
    unknown = set(spec) - {
        "jwks_file",
        "jwks",
        "pem_file",
        "kid",
        "keys",
        "jku",
        "sub",
        "tenants",
        "services",
    }
    if unknown:
        raise fail("", f"unknown keys {sorted(unknown)}")
    keys: dict[str, Any] = {}
    algs: dict[str, str] = {}
    if "jwks_file" in spec:
        keys.update(_jwks(_read_json(base / str(spec["jwks_file"]), fail), ".jwks_file", fail, algs))
    if "jwks" in spec:
        keys.update(_jwks(spec["jwks"], ".jwks", fail, algs))
    if "pem_file" in spec:
        keys[str(spec.get("kid") or "*")] = _pem(base / str(spec["pem_file"]), ".pem_file", fail)
    for i, item in enumerate(spec.get("keys") or []):
        if not isinstance(item, dict) or not item.get("kid") or not item.get("pem_file"):
            raise fail(f".keys[{i}]", "expected {kid, pem_file}")
        keys[str(item["kid"])] = _pem(base / str(item["pem_file"]), f".keys[{i}]", fail)
    if not keys:
        raise fail("", "no public key configured (jwks_file, jwks, pem_file or keys)")
    return Issuer(
        iss=iss,
        keys=keys,
        key_algs=algs,
        jku=_strings(spec.get("jku"), ".jku", fail) or (),
        subjects=_strings(spec.get("sub"), ".sub", fail),
        tenants=_strings(spec.get("tenants"), ".tenants", fail),
        services=_strings(spec.get("services"), ".services", fail),
    )


def _read_json(path: Path, fail: Any) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise fail(".jwks_file", f"{path}: {exc}") from None


def _jwks(data: Any, where: str, fail: Any, algs: dict[str, str]) -> dict[str, Any]:
    from jwt import PyJWK
    from jwt.exceptions import PyJWKError

    if not isinstance(data, dict) or not isinstance(data.get("keys"), list):
        raise fail(where, 'expected a JWK Set: {"keys": [...]}')
    out: dict[str, Any] = {}
    for i, jwk in enumerate(data["keys"]):
        if not isinstance(jwk, dict) or not jwk.get("kid"):
            raise fail(f"{where}.keys[{i}]", "each JWK needs a kid (CDS Hooks: kid is REQUIRED)")
        if any(k in jwk for k in ("d", "p", "q", "k")):
            raise fail(
                f"{where}.keys[{i}]",
                "contains private or symmetric key material; configure the public key only",
            )
        if jwk.get("use") not in (None, "sig"):
            continue
        if jwk.get("alg") is not None:
            algs[str(jwk["kid"])] = str(jwk["alg"])
        try:
            out[str(jwk["kid"])] = PyJWK(jwk).key
        except (PyJWKError, ValueError, TypeError) as exc:
            raise fail(f"{where}.keys[{i}]", f"unusable JWK: {exc}") from None
    return out


def _pem(path: Path, where: str, fail: Any) -> Any:
    from cryptography.hazmat.primitives.serialization import load_pem_public_key

    try:
        return load_pem_public_key(path.read_bytes())
    except (OSError, ValueError) as exc:
        raise fail(where, f"{path}: not a readable PEM public key ({exc})") from None


# ============================================================================ replay cache
class ReplayCache:
    """Remembers (iss, jti) until the token expires; thread-safe and bounded."""

    def __init__(self, max_entries: int = 100_000) -> None:
        self._expiry: dict[tuple[str, str], float] = {}
        self._heap: list[tuple[float, tuple[str, str]]] = []
        self._lock = threading.Lock()
        self.max_entries = max_entries

    def __len__(self) -> int:
        return len(self._expiry)

    def add(self, iss: str, jti: str, until: float, now: float) -> bool:
        """Record a nonce; False if it was already seen and has not expired."""
        key = (iss, jti)
        with self._lock:
            while self._heap and self._heap[0][0] < now:
                _, old = heapq.heappop(self._heap)
                if self._expiry.get(old, now + 1) < now:
                    del self._expiry[old]
            if key in self._expiry:
                return False
            if len(self._expiry) >= self.max_entries:
                raise AuthError(
                    503, "auth.replay_cache_full", "too many live tokens to remember; retry shortly"
                )
            self._expiry[key] = until
            heapq.heappush(self._heap, (until, key))
            return True


# ============================================================================ verification
class TokenVerifier:
    """Checks the bearer JWT of one CDS Hooks request against an :class:`AuthConfig`."""

    def __init__(self, config: AuthConfig, default_audience: str, *, clock: Any = time.time) -> None:
        self.config = config
        self.audience_base = (config.audience or default_audience).rstrip("/")
        self.replay = ReplayCache(config.replay_cache_size)
        self._clock = clock

    def expected_audiences(self, path: str) -> list[str]:
        """The endpoint URL being called; feedback also accepts its service's URL."""
        path = "/" + path.strip("/")
        auds = [self.audience_base + path]
        if path.endswith("/feedback") and path.count("/") == 3:
            auds.append(self.audience_base + path[: -len("/feedback")])
        return auds

    def verify(self, authorization: str | None, path: str, service: str | None) -> dict[str, Any]:
        """The verified claims, or :class:`AuthError`. ``service`` is the CDS service id (or None
        for discovery)."""
        import jwt

        token = _bearer(authorization)
        try:
            header = jwt.get_unverified_header(token)
            unverified = jwt.decode(token, options={"verify_signature": False})
        except jwt.PyJWTError as exc:
            raise AuthError(401, "auth.malformed", f"bearer token is not a JWT: {exc}") from None
        alg = header.get("alg")
        if alg not in self.config.algorithms:
            raise AuthError(
                401,
                "auth.algorithm",
                f"JWT alg {alg!r} is not accepted; accepted: {', '.join(self.config.algorithms)}",
            )
        if str(header.get("typ", "")).upper() != "JWT":
            raise AuthError(401, "auth.header", "JWT header typ must be 'JWT'")
        kid = header.get("kid")
        if not isinstance(kid, str) or not kid:
            raise AuthError(401, "auth.header", "JWT header kid is required")
        iss = unverified.get("iss")
        issuer = self.config.issuers.get(iss) if isinstance(iss, str) else None
        if issuer is None:
            raise AuthError(401, "auth.issuer", f"issuer {iss!r} is not trusted by this service")
        jku = header.get("jku")
        if jku is not None and jku not in issuer.jku:
            raise AuthError(401, "auth.jku", f"jku {jku!r} is not configured for issuer {iss!r}")
        key = issuer.keys.get(kid, issuer.keys.get("*"))
        if key is None:
            raise AuthError(401, "auth.kid", f"no key with kid {kid!r} for issuer {iss!r}")
        if issuer.key_algs.get(kid, alg) != alg:
            raise AuthError(401, "auth.algorithm", f"key {kid!r} is for {issuer.key_algs[kid]}, not {alg}")
        leeway = self.config.leeway_seconds
        try:
            claims = jwt.decode(
                token,
                key,
                algorithms=[alg],
                audience=self.expected_audiences(path),
                issuer=iss,
                leeway=leeway,
                options={"require": list(REQUIRED_CLAIMS), "verify_iat": True},
            )
        except jwt.ExpiredSignatureError:
            raise AuthError(401, "auth.expired", "JWT has expired (exp)") from None
        except jwt.InvalidAudienceError:
            raise AuthError(
                401,
                "auth.audience",
                "JWT aud does not name this endpoint; expected " + " or ".join(self.expected_audiences(path)),
            ) from None
        except jwt.MissingRequiredClaimError as exc:
            raise AuthError(
                401,
                "auth.claims",
                f"JWT lacks required claim {exc.claim!r}; required: {', '.join(REQUIRED_CLAIMS)}",
            ) from None
        except jwt.ImmatureSignatureError:
            raise AuthError(401, "auth.not_yet_valid", "JWT iat or nbf is in the future") from None
        except jwt.PyJWTError as exc:
            raise AuthError(401, "auth.invalid", f"JWT rejected: {exc}") from None
        self._check_times(claims)
        jti = claims.get("jti")
        if not isinstance(jti, str) or not jti:
            raise AuthError(401, "auth.claims", "JWT jti must be a non-empty string")
        now = self._clock()
        if not self.replay.add(iss, jti, float(claims["exp"]) + leeway, now):
            raise AuthError(401, "auth.replay", f"JWT jti {jti!r} was already used")
        self._check_permissions(issuer, claims, service)
        return claims

    def _check_times(self, claims: Mapping[str, Any]) -> None:
        exp, iat = claims["exp"], claims["iat"]
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (exp, iat)):
            raise AuthError(401, "auth.claims", "JWT exp and iat must be numbers (seconds)")
        if exp - iat > self.config.max_lifetime_seconds:
            raise AuthError(
                401,
                "auth.lifetime",
                f"JWT lifetime exp - iat = {exp - iat:g} s exceeds the "
                f"{self.config.max_lifetime_seconds:g} s allowed",
            )

    @staticmethod
    def _check_permissions(issuer: Issuer, claims: Mapping[str, Any], service: str | None) -> None:
        checks: Iterable[tuple[tuple[str, ...] | None, Any, str]] = (
            (issuer.subjects, claims.get("sub"), "sub"),
            (issuer.tenants, claims.get("tenant"), "tenant"),
        )
        for allowed, value, name in checks:
            if allowed is not None and value not in allowed:
                raise AuthError(
                    403, "auth.forbidden", f"{name} {value!r} is not allowed for issuer {issuer.iss!r}"
                )
        if service is not None and issuer.services is not None and service not in issuer.services:
            raise AuthError(403, "auth.forbidden", f"issuer {issuer.iss!r} may not call service {service!r}")


def _bearer(authorization: str | None) -> str:
    if not authorization:
        raise AuthError(401, "auth.missing", "Authorization: Bearer <JWT> header is required")
    scheme, _, token = authorization.strip().partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        raise AuthError(401, "auth.missing", "Authorization header must be 'Bearer <JWT>'")
    return token.strip()
