"""SMART Backend Services: how gasgap, a background service, gets an access token from a
hospital's FHIR authorisation server (SMART App Launch v2, "Backend Services").

The site registers gasgap's public key (a JWKS, printed by ``gasgap fhir jwks``) with its
EHR and gets a client id. To get a token gasgap signs a short-lived JWT, the client
assertion (``iss`` = ``sub`` = client id, ``aud`` = the token URL, ``exp`` at most five
minutes ahead, a unique ``jti``), with its private key (RS384 or ES384), and posts it to
the token endpoint in an OAuth 2.0 client-credentials grant::

    grant_type=client_credentials
    scope=system/Observation.rs system/Patient.rs ...
    client_assertion_type=urn:ietf:params:oauth:client-assertion-type:jwt-bearer
    client_assertion=<the signed JWT>

Signing is PyJWT's (with ``cryptography``); nothing here signs by hand. The token
endpoint comes from the settings or from ``[base]/.well-known/smart-configuration``.
``SmartAuth`` is an ``httpx.Auth``: it caches the token until shortly before it expires,
fetches a new one then, and on a 401 answer fetches a new one and retries the request
once. Errors name what the server refused (``invalid_client``, ``invalid_scope`` ...)
and never show the key, the assertion or a token.

The private key is read from a PEM file or an environment variable, never from the
site file.
"""

from __future__ import annotations

import base64
import hashlib
import json
import logging
import re
import secrets
import stat
import threading
import time
from collections.abc import Callable, Generator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal, Self
from urllib.parse import urlsplit

import httpx
import jwt
import pydantic
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec, rsa
from jwt.algorithms import ECAlgorithm, RSAAlgorithm
from pydantic import BaseModel, ConfigDict, Field

from monitor.engine.errors import MonitorError

log = logging.getLogger("gasgap.fhir.smart")

ASSERTION_TYPE = "urn:ietf:params:oauth:client-assertion-type:jwt-bearer"
#: Scopes a reading source needs (SMART v2 syntax: read + search).
READ_SCOPES = ("system/Observation.rs", "system/Patient.rs", "system/Encounter.rs")
#: Longest allowed assertion lifetime (SMART Backend Services: exp no more than 5 min).
MAX_ASSERTION_S = 300
_SCOPE = re.compile(r"^system/(\*|[A-Z][A-Za-z]+)\.([cruds]+|read|write|\*)(\?\S*)?$")
_ENV_NAME = re.compile(r"^[A-Z_][A-Z0-9_]*$")


class SmartSettings(BaseModel):
    """``[sources.fhir.smart]``: SMART Backend Services for one FHIR server.

    Exactly one of ``private_key_file`` (a PEM file, readable by gasgap only) and
    ``private_key_env`` (an environment variable, or a key of the secrets file, holding
    the PEM text) names the private key. ``token_url`` is discovered from
    ``[base]/.well-known/smart-configuration`` when left out. ``key_id`` is the ``kid``
    registered with the EHR; left out, it is the key's RFC 7638 thumbprint.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    client_id: str = Field(min_length=1, max_length=255)
    token_url: str | None = None
    private_key_file: Path | None = None
    private_key_env: Annotated[str, Field(pattern=_ENV_NAME.pattern)] | None = None
    key_id: str | None = Field(default=None, min_length=1, max_length=255)
    algorithm: Literal["RS384", "ES384"] = "ES384"
    scopes: tuple[str, ...] = READ_SCOPES
    #: Seconds before the token's expiry at which a new one is fetched.
    refresh_margin_s: float = Field(default=60.0, ge=0, le=3600)
    #: The assertion's lifetime (exp - now), at most 300 s.
    assertion_lifetime_s: int = Field(default=240, ge=10, le=MAX_ASSERTION_S)
    timeout_s: float = Field(default=30.0, gt=0, le=300)

    @pydantic.field_validator("token_url")
    @classmethod
    def _url(cls, value: str | None) -> str | None:
        if value is None:
            return value
        parts = urlsplit(value)
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise ValueError("token_url must be an http:// or https:// address with a host")
        return value

    @pydantic.field_validator("scopes")
    @classmethod
    def _scopes(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        if not value:
            raise ValueError("at least one scope is needed, e.g. system/Observation.rs")
        for scope in value:
            if not _SCOPE.match(scope):
                raise ValueError(
                    f"scope {scope!r} is not a SMART system scope "
                    "(system/<Type>.<cruds>, e.g. system/Observation.rs)"
                )
        return value

    @pydantic.model_validator(mode="after")
    def _one_key(self) -> Self:
        if (self.private_key_file is None) == (self.private_key_env is None):
            raise ValueError("give exactly one of private_key_file and private_key_env")
        if "PRIVATE KEY" in self.model_dump_json():
            raise ValueError(
                "a private key is never written in the site file: name a file or "
                "an environment variable with private_key_file or private_key_env"
            )
        return self


class SmartAuthError(MonitorError, RuntimeError):
    """A token could not be had. ``error`` is the OAuth error code when the server gave
    one (``invalid_client``, ``invalid_scope`` ...); ``retryable`` says whether asking
    again later may help (a transport failure or a 5xx, not a refusal)."""

    def __init__(self, message: str, *, error: str | None = None, retryable: bool = False):
        super().__init__(message)
        self.error = error
        self.retryable = retryable


class SmartKeyError(MonitorError, ValueError):
    """The private key cannot be used; the message names the file or variable and why."""


# --- keys ---------------------------------------------------------------------------------

PrivateKey = rsa.RSAPrivateKey | ec.EllipticCurvePrivateKey


def load_private_key(
    settings: SmartSettings, lookup: Callable[[str], str] | None = None
) -> PrivateKey:
    """The private key named by the settings, checked against the algorithm.

    ``lookup`` reads a named secret; the composition root passes one that reads the
    environment, else the site's secrets file. A PEM in a variable may have its newlines written
    as ``\\n``.
    """
    if settings.private_key_file is not None:
        where = str(settings.private_key_file)
        try:
            mode = settings.private_key_file.stat().st_mode
            data = settings.private_key_file.read_bytes()
        except OSError as exc:
            raise SmartKeyError(f"{where}: cannot read the private key: {exc.strerror}") from None
        if mode & (stat.S_IRWXG | stat.S_IRWXO):
            log.warning("%s: the private key is readable by others; chmod 600 it", where)
    else:
        name = str(settings.private_key_env)
        where = f"environment variable {name}"
        if lookup is None:
            # secrets are resolved by the composition root (environment, else the
            # secrets file); an adapter never reads the process environment itself
            raise SmartKeyError(f"{where}: no secret lookup was given to read it with")
        try:
            text = lookup(name)
        except Exception as exc:  # the service's secret lookup names what is missing
            raise SmartKeyError(f"{where}: {exc}") from None
        if not text:
            raise SmartKeyError(f"{where}: not set (it should hold the PEM private key)")
        data = text.replace("\\n", "\n").encode()
    try:
        key = serialization.load_pem_private_key(data, password=None)
    except (ValueError, TypeError) as exc:
        # the library's message says what is wrong with the format, never the content
        raise SmartKeyError(
            f"{where}: not an unencrypted PEM private key ({type(exc).__name__})"
        ) from None
    return check_key(key, settings.algorithm, where)


def check_key(key: object, algorithm: str, where: str) -> PrivateKey:
    """The key, if it fits the algorithm: RS384 needs RSA of at least 2048 bits
    (RFC 7518 section 3.3), ES384 an EC key on P-384 (RFC 7518 section 3.4)."""
    if algorithm == "RS384":
        if not isinstance(key, rsa.RSAPrivateKey):
            raise SmartKeyError(f"{where}: RS384 needs an RSA key, got {_key_kind(key)}")
        if key.key_size < 2048:
            raise SmartKeyError(f"{where}: RSA key of {key.key_size} bits; RS384 needs >= 2048")
        return key
    if not isinstance(key, ec.EllipticCurvePrivateKey) or key.curve.name != "secp384r1":
        raise SmartKeyError(f"{where}: ES384 needs an EC key on P-384, got {_key_kind(key)}")
    return key


def _key_kind(key: object) -> str:
    if isinstance(key, rsa.RSAPrivateKey):
        return f"RSA {key.key_size} bits"
    if isinstance(key, ec.EllipticCurvePrivateKey):
        return f"EC {key.curve.name}"
    return type(key).__name__


def public_jwk(key: PrivateKey, algorithm: str, key_id: str | None = None) -> dict[str, Any]:
    """The public half of ``key`` as a JWK (RFC 7517) with ``alg``, ``use`` and ``kid``."""
    public = key.public_key()
    if isinstance(public, rsa.RSAPublicKey):
        jwk: dict[str, Any] = RSAAlgorithm.to_jwk(public, as_dict=True)
    else:
        jwk = ECAlgorithm.to_jwk(public, as_dict=True)
    jwk = {k: v for k, v in jwk.items() if k in ("kty", "n", "e", "crv", "x", "y")}
    jwk.update(alg=algorithm, use="sig", key_ops=["verify"])
    jwk["kid"] = key_id or jwk_thumbprint(jwk)
    return jwk


def jwk_thumbprint(jwk: Mapping[str, Any]) -> str:
    """RFC 7638 JWK thumbprint (SHA-256, base64url): the required members in
    lexicographic order, no whitespace."""
    required = ("e", "kty", "n") if jwk["kty"] == "RSA" else ("crv", "kty", "x", "y")
    canonical = json.dumps({k: jwk[k] for k in required}, separators=(",", ":"), sort_keys=True)
    digest = hashlib.sha256(canonical.encode()).digest()
    return base64.urlsafe_b64encode(digest).rstrip(b"=").decode("ascii")


def public_jwks(
    settings: SmartSettings, lookup: Callable[[str], str] | None = None
) -> dict[str, Any]:
    """The JWKS the site registers with its EHR: the public key only."""
    key = load_private_key(settings, lookup)
    return {"keys": [public_jwk(key, settings.algorithm, settings.key_id)]}


# --- tokens -------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class AccessToken:
    value: str
    expires_at: float
    """On the ``SmartAuth`` clock (monotonic seconds)."""
    scopes: tuple[str, ...]


class SmartAuth(httpx.Auth):
    """Bearer tokens from a SMART Backend Services token endpoint, for an httpx client.

    Thread-safe: one token is shared by every request, fetched by one thread at a time.
    """

    def __init__(
        self,
        settings: SmartSettings,
        base_url: str,
        *,
        key: PrivateKey | None = None,
        lookup: Callable[[str], str] | None = None,
        client: httpx.Client | None = None,
        clock: Callable[[], float] = time.monotonic,
        wall_clock: Callable[[], float] = time.time,
    ) -> None:
        self.settings = settings
        self.base_url = base_url.rstrip("/")
        self._key = key if key is not None else load_private_key(settings, lookup)
        self._kid = settings.key_id or public_jwk(self._key, settings.algorithm)["kid"]
        self._client = client or httpx.Client(timeout=settings.timeout_s)
        self._clock = clock
        self._wall = wall_clock
        self._lock = threading.Lock()
        self._token: AccessToken | None = None
        self._token_url = settings.token_url
        self.tokens_fetched = 0

    def close(self) -> None:
        self._client.close()

    # --- httpx.Auth ---------------------------------------------------------------------

    def auth_flow(self, request: httpx.Request) -> Generator[httpx.Request, httpx.Response, None]:
        token = self.token()
        request.headers["Authorization"] = f"Bearer {token.value}"
        response = yield request
        if response.status_code == 401:
            # the server no longer takes this token (revoked, or its clock is ahead of
            # ours): get a new one and try once more
            log.info("FHIR server answered 401 to %s: fetching a new token", request.url.path)
            token = self.token(rejected=token)
            request.headers["Authorization"] = f"Bearer {token.value}"
            yield request

    def headers(self) -> dict[str, str]:
        """The Authorization header with a current token (for callers without httpx.Auth)."""
        return {"Authorization": f"Bearer {self.token().value}"}

    # --- the token ------------------------------------------------------------------------

    def token(self, rejected: AccessToken | None = None) -> AccessToken:
        """A token valid for at least ``refresh_margin_s`` more seconds; a new one when
        ``rejected`` is the one cached (a 401 came back for it)."""
        with self._lock:
            current = self._token
            if current is not None and current is not rejected and not self._stale(current):
                return current
            self._token = self._fetch()
            return self._token

    def _stale(self, token: AccessToken) -> bool:
        lifetime_left = token.expires_at - self._clock()
        return lifetime_left <= self.settings.refresh_margin_s

    def token_url(self) -> str:
        """The token endpoint: from the settings, or discovered once."""
        if self._token_url is None:
            self._token_url = discover_token_url(self.base_url, self._client, self.settings)
        return self._token_url

    def client_assertion(self, token_url: str) -> str:
        """A freshly signed client assertion for ``token_url`` (unique ``jti``)."""
        now = int(self._wall())
        claims = {
            "iss": self.settings.client_id,
            "sub": self.settings.client_id,
            "aud": token_url,
            "iat": now,
            "exp": now + self.settings.assertion_lifetime_s,
            "jti": secrets.token_urlsafe(32),
        }
        headers = {"kid": self._kid, "typ": "JWT"}
        return jwt.encode(claims, self._key, algorithm=self.settings.algorithm, headers=headers)

    def _fetch(self) -> AccessToken:
        url = self.token_url()
        form = {
            "grant_type": "client_credentials",
            "scope": " ".join(self.settings.scopes),
            "client_assertion_type": ASSERTION_TYPE,
            "client_assertion": self.client_assertion(url),
        }
        started = self._clock()
        try:
            response = self._client.post(url, data=form, headers={"Accept": "application/json"})
        except httpx.HTTPError as exc:
            raise SmartAuthError(
                f"token endpoint {_where(url)}: could not connect ({type(exc).__name__})",
                retryable=True,
            ) from None
        body = _json_object(response)
        if response.status_code != 200:
            error = str(body.get("error") or "") or None
            described = _clean(body.get("error_description"))
            what = error or f"HTTP {response.status_code}"
            raise SmartAuthError(
                f"token endpoint {_where(url)} refused client {self.settings.client_id!r}: "
                f"{what}{f' ({described})' if described else ''}{_hint(error)}",
                error=error,
                retryable=response.status_code >= 500 or response.status_code == 429,
            )
        value = body.get("access_token")
        if not isinstance(value, str) or not value:
            raise SmartAuthError(f"token endpoint {_where(url)}: the answer has no access_token")
        token_type = str(body.get("token_type") or "")
        if token_type.lower() != "bearer":
            raise SmartAuthError(
                f"token endpoint {_where(url)}: token_type {token_type!r}, expected bearer"
            )
        try:
            expires_in = float(body.get("expires_in", 300))
        except (TypeError, ValueError):
            expires_in = 300.0
        granted = tuple(str(body.get("scope") or " ".join(self.settings.scopes)).split())
        missing = [s for s in self.settings.scopes if s not in granted]
        if missing:
            log.warning(
                "token endpoint %s granted fewer scopes than asked: missing %s",
                _where(url),
                " ".join(missing),
            )
        self.tokens_fetched += 1
        log.info("access token from %s for %.0f s", _where(url), expires_in)
        return AccessToken(value, started + expires_in, granted)


def discover_token_url(base_url: str, client: httpx.Client, settings: SmartSettings) -> str:
    """``token_endpoint`` from ``[base]/.well-known/smart-configuration`` (SMART App
    Launch v2, "SMART configuration"); checks the server signs-in with our algorithm."""
    url = f"{base_url.rstrip('/')}/.well-known/smart-configuration"
    try:
        response = client.get(url, headers={"Accept": "application/json"})
    except httpx.HTTPError as exc:
        raise SmartAuthError(
            f"{_where(url)}: could not connect ({type(exc).__name__})", retryable=True
        ) from None
    if response.status_code != 200:
        raise SmartAuthError(
            f"{_where(url)}: HTTP {response.status_code}; set token_url in [sources.fhir.smart]",
            retryable=response.status_code >= 500,
        )
    config = _json_object(response)
    token_url = config.get("token_endpoint")
    if not isinstance(token_url, str) or not token_url.startswith(("http://", "https://")):
        raise SmartAuthError(f"{_where(url)}: no token_endpoint; set token_url instead")
    methods = config.get("token_endpoint_auth_methods_supported")
    if isinstance(methods, list) and "private_key_jwt" not in methods:
        raise SmartAuthError(f"{_where(url)}: the server does not take private_key_jwt clients")
    algs = config.get("token_endpoint_auth_signing_alg_values_supported")
    if isinstance(algs, list) and settings.algorithm not in algs:
        raise SmartAuthError(
            f"{_where(url)}: the server takes {', '.join(map(str, algs))}, "
            f"not {settings.algorithm}: change algorithm (and the key)"
        )
    return token_url


_HINTS = {
    "invalid_client": "; check the client id, that the registered JWKS holds this key "
    "(gasgap fhir jwks), the key id and algorithm, and this machine's clock",
    "invalid_scope": "; ask the EHR team to grant the scopes, or ask for fewer",
    "unauthorized_client": "; the client is not allowed the client_credentials grant",
}


def _hint(error: str | None) -> str:
    return _HINTS.get(error or "", "")


def _json_object(response: httpx.Response) -> dict[str, Any]:
    try:
        data = response.json()
    except ValueError:
        return {}
    return data if isinstance(data, dict) else {}


def _clean(text: object) -> str:
    """A server's error description, one line, short, and without anything token-like."""
    if not isinstance(text, str):
        return ""
    text = " ".join(text.split())[:200]
    return re.sub(r"eyJ[A-Za-z0-9_\-]+\.[A-Za-z0-9_\-.]+", "<jwt>", text)


def _where(url: str) -> str:
    parts = urlsplit(url)
    return f"{parts.scheme}://{parts.netloc}{parts.path}"
