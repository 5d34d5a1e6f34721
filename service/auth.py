"""Who may call which route: one table of access rules and the bearer-token check.

Every route of the app has exactly one entry in ``ACCESS_RULES``, keyed by
method and path template; ``create_app`` refuses to build an app with a
route missing from the table, and the access check refuses (403) any route it
cannot find, so a new route cannot slip in unguarded.

Roles (``service.tokens.ROLES``):

    score    scores; reads model metadata and record schemas (to build requests)
    operate  activates, rolls back, previews and chooses refuse or flag for records outside the
             domain; reads metadata, schemas, bundles and history
    audit    reads metadata, schemas, bundles and history

The pages under ``/view/`` and their files are public (they hold no model
data); the ``/view/data/...`` routes they fetch have the rule of the JSON
route each draws. Without a tokens file, scoring and metadata are open; history, bundle
downloads and version changes are refused with 403 and an explanation (the
bundle holds support vectors, which are training rows).

Tokens arrive as ``Authorization: Bearer <token>`` (RFC 6750 section 2.1).
The presented token's SHA-256 is compared with every stored digest using
``hmac.compare_digest``, without stopping at the first match, so timing does
not reveal which or how many digests share a prefix.
"""

from __future__ import annotations

import hmac
import logging
import os
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

from starlette.requests import Request
from starlette.types import Scope

from model_store.errors import InputError
from service.problems import ServiceProblem
from service.tokens import TokenEntry, read_tokens, token_digest

__all__ = ["ACCESS_RULES", "AccessRule", "Authenticator", "Caller", "access_check", "admit"]

_log = logging.getLogger("rbfgate.service")


@dataclass(frozen=True)
class AccessRule:
    """roles: roles admitted when tokens are on; public: open to all, always;
    open_without_tokens: open to all when the service runs without a tokens file;
    action: what the route does, for error messages."""

    roles: frozenset[str]
    action: str
    public: bool = False
    open_without_tokens: bool = False


_PUBLIC = AccessRule(frozenset(), "health and metrics", public=True)
_PROBLEM_PAGES = AccessRule(frozenset(), "reading what a problem type means", public=True)
# Pages and their files hold no model data; the data they fetch has the rules below.
_VIEW_PAGES = AccessRule(frozenset(), "opening a page (its data needs the data routes' roles)", public=True)
_SCORE = AccessRule(frozenset({"score"}), "scoring", open_without_tokens=True)
_METADATA = AccessRule(frozenset({"score", "operate", "audit"}), "reading model metadata", open_without_tokens=True)
_BUNDLE = AccessRule(frozenset({"operate", "audit"}), "downloading a bundle (it holds training rows)")
_HISTORY = AccessRule(frozenset({"operate", "audit"}), "reading the history")
_OPERATE = AccessRule(frozenset({"operate"}), "changing or previewing the active version")
_OUTSIDE = AccessRule(frozenset({"operate"}), "choosing what the model does with records outside its domain")

ACCESS_RULES: Mapping[tuple[str, str], AccessRule] = {
    ("POST", "/score/{model}"): _SCORE,
    ("POST", "/score/{model}/versions/{version}"): _SCORE,
    ("GET", "/models"): _METADATA,
    ("GET", "/models/{model}"): _METADATA,
    ("GET", "/models/{model}/versions/{version}"): _METADATA,
    ("GET", "/models/{model}/versions/{version}/schema"): _METADATA,
    ("GET", "/models/{model}/openapi.json"): _METADATA,
    ("GET", "/models/{model}/versions/{version}/openapi.json"): _METADATA,
    ("GET", "/models/{model}/versions/{version}/bundle"): _BUNDLE,
    ("GET", "/models/{model}/history"): _HISTORY,
    ("POST", "/models/{model}/activate"): _OPERATE,
    ("POST", "/models/{model}/rollback"): _OPERATE,
    ("POST", "/models/{model}/preview"): _OPERATE,
    ("POST", "/models/{model}/outside-domain"): _OUTSIDE,
    ("GET", "/healthz"): _PUBLIC,
    ("GET", "/readyz"): _PUBLIC,
    ("GET", "/metrics"): _PUBLIC,
    ("GET", "/openapi.json"): _METADATA,
    ("GET", "/problems/{kind}"): _PROBLEM_PAGES,
    # The pages (service.view_routes): each data route has the rule of the JSON route it draws.
    ("GET", "/"): _VIEW_PAGES,
    ("GET", "/view/"): _VIEW_PAGES,
    ("GET", "/view/models/{model}"): _VIEW_PAGES,
    ("GET", "/view/models/{model}/versions/{version}"): _VIEW_PAGES,
    ("GET", "/view/models/{model}/try"): _VIEW_PAGES,
    ("GET", "/view/models/{model}/preview"): _VIEW_PAGES,
    ("GET", "/view/assets/{name:path}"): _VIEW_PAGES,
    ("GET", "/view/data/session"): _VIEW_PAGES,  # answers who the caller is; refuses nobody
    ("GET", "/view/data/models"): _METADATA,
    ("GET", "/view/data/models/{model}/versions/{version}/card"): _METADATA,
    ("GET", "/view/data/models/{model}/timeline"): _HISTORY,
    ("POST", "/view/data/models/{model}/try"): _SCORE,
    ("POST", "/view/data/models/{model}/preview"): _OPERATE,
}


@dataclass(frozen=True)
class Caller:
    """Who made a request: a token's name and role, or anonymous (both None)."""

    name: str | None = None
    role: str | None = None


_ANONYMOUS = Caller()


class Authenticator:
    """Checks bearer tokens against the tokens file, re-reading it when it changes.

    If the file becomes unreadable while serving, every token is refused
    (fail closed) until it is readable again: a revoked token must never come
    back to life because the file was damaged.
    """

    def __init__(self, tokens_file: Path | None) -> None:
        self.tokens_file = tokens_file
        self._entries: tuple[TokenEntry, ...] = ()
        self._stamp: tuple[int, int, int] | None = None
        self._error: str | None = None
        self._lock = threading.Lock()
        if tokens_file is not None:
            self._entries = tuple(read_tokens(tokens_file))  # unreadable at start: refuse to start
            self._stamp = _stamp(tokens_file)

    @property
    def enabled(self) -> bool:
        return self.tokens_file is not None

    def status(self) -> dict[str, object]:
        """For /readyz: whether tokens are on, how many, and the last reload error."""
        return {"enabled": self.enabled, "tokens": len(self._entries), "error": self._error}

    def refresh(self) -> None:
        """Re-read the tokens file if its inode, size or modification time changed."""
        if self.tokens_file is None:
            return
        with self._lock:
            stamp = _stamp(self.tokens_file)
            if stamp == self._stamp and self._error is None:
                return
            try:
                entries = tuple(read_tokens(self.tokens_file))
            except InputError as exc:
                if self._error is None:
                    _log.error("tokens file unusable, refusing every token until it is fixed: %s", exc)
                self._entries, self._error, self._stamp = (), str(exc), stamp
                return
            self._entries, self._error, self._stamp = entries, None, stamp

    def check(self, rule: AccessRule, authorization: str | None) -> Caller:
        """The caller if ``rule`` admits them, else raise the 401 or 403 problem."""
        if rule.public:
            return _ANONYMOUS
        if not self.enabled:
            if rule.open_without_tokens:
                return _ANONYMOUS
            raise ServiceProblem(
                403,
                "tokens-required",
                "This route needs tokens",
                f"{rule.action} is refused because the service runs without a tokens file; "
                f"restart it with `rbfgate serve --tokens FILE` and send a token with role "
                f"{' or '.join(sorted(rule.roles))}",
            )
        entry = self._match(authorization)
        if entry.role not in rule.roles:
            raise ServiceProblem(
                403,
                "role-not-allowed",
                "The token's role does not allow this",
                f"{rule.action} needs role {' or '.join(sorted(rule.roles))}; token {entry.name!r} has role {entry.role!r}",
            )
        return Caller(entry.name, entry.role)

    def _match(self, authorization: str | None) -> TokenEntry:
        if not authorization:
            raise _unauthorized("no Authorization header; send `Authorization: Bearer <token>`", invalid=False)
        scheme, _, token = authorization.partition(" ")
        token = token.strip()
        if scheme.lower() != "bearer" or not token:
            raise _unauthorized("the Authorization header must be `Bearer <token>`", invalid=True)
        presented = token_digest(token).encode("ascii")
        found = None
        for entry in self._entries:  # no early exit: constant work whatever matches
            if hmac.compare_digest(presented, entry.sha256.encode("ascii")):
                found = entry
        if found is None:
            reason = "the tokens file cannot be read, so no token is accepted" if self._error else "unknown or revoked token"
            raise _unauthorized(reason, invalid=True)
        return found


def admit(authenticator: Authenticator, scope: Scope, rules: Mapping[tuple[str, str], AccessRule] = ACCESS_RULES) -> None:
    """Check the caller of a request against the rule of the route it matched (``scope["route"]``),
    and keep the caller in the request's state for the log line; raise the 401 or 403 problem.

    The one access check: FastAPI runs it as the app-wide dependency (``access_check``), and the
    score routes' lean path (``service.score_dispatch``) runs it itself.
    """
    rule = rules.get((scope["method"], getattr(scope.get("route"), "path", "")))
    if rule is None:  # create_app refuses this; stay closed should it ever happen
        raise ServiceProblem(403, "no-access-rule", "Forbidden", "this route has no access rule, so it is closed")
    scope.setdefault("state", {})["caller"] = authenticator.check(rule, _authorization(scope))


def access_check(authenticator: Authenticator, rules: Mapping[tuple[str, str], AccessRule] = ACCESS_RULES) -> Callable:
    """The app-wide FastAPI dependency: ``admit`` for the route FastAPI matched."""

    async def check_access(request: Request) -> None:
        admit(authenticator, request.scope, rules)

    return check_access


def _authorization(scope: Scope) -> str | None:
    """The first ``Authorization`` header, as Starlette's ``request.headers`` reads it (latin-1)."""
    for name, value in scope["headers"]:
        if name == b"authorization":  # ASGI header names are lower-cased
            return value.decode("latin-1")
    return None


def _unauthorized(detail: str, *, invalid: bool) -> ServiceProblem:
    challenge = 'Bearer realm="rbfgate"' + (', error="invalid_token"' if invalid else "")
    return ServiceProblem(401, "unauthorized", "A valid token is required", detail, headers={"WWW-Authenticate": challenge})


def _stamp(path: Path) -> tuple[int, int, int] | None:
    try:
        info = os.stat(path)
    except OSError:
        return None
    return info.st_ino, info.st_size, info.st_mtime_ns
