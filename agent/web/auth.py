"""Who may read the live page: loopback by default; any other bind needs a bearer token from
a file or a password file of salted scrypt hashes (HTTP Basic)."""

from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import ipaddress
import os
import secrets
from collections.abc import Awaitable, Callable, MutableMapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

# scrypt cost (RFC 7914): N = 2**14, r = 8, p = 1 is the common interactive-login setting
# (common practice); 16 MiB of memory per check.
SCRYPT_N, SCRYPT_R, SCRYPT_P = 2 ** 14, 8, 1
MIN_TOKEN_CHARS = 16


class AuthError(ValueError):
    """A token or password file that cannot be used (one line: what, where)."""


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def hash_password(password: str, *, salt: bytes | None = None) -> str:
    """``scrypt$N$r$p$<salt b64>$<hash b64>`` of a password (RFC 7914 scrypt)."""
    salt = salt or os.urandom(16)
    digest = hashlib.scrypt(password.encode(), salt=salt, n=SCRYPT_N, r=SCRYPT_R, p=SCRYPT_P,
                            dklen=32)
    return "$".join(("scrypt", str(SCRYPT_N), str(SCRYPT_R), str(SCRYPT_P),
                     base64.b64encode(salt).decode(), base64.b64encode(digest).decode()))


def _check(password: str, stored: str) -> bool:
    try:
        scheme, n, r, p, salt, digest = stored.split("$")
        if scheme != "scrypt":
            return False
        want = base64.b64decode(digest, validate=True)
        got = hashlib.scrypt(password.encode(), salt=base64.b64decode(salt, validate=True),
                             n=int(n), r=int(r), p=int(p), dklen=len(want),
                             maxmem=128 * int(n) * int(r) * 2)
    except (ValueError, binascii.Error):
        return False
    return hmac.compare_digest(got, want)


@dataclass
class Auth:
    """Credentials the app accepts: a bearer token and/or ``user:hash`` lines."""

    token: str | None = None
    users: dict[str, str] = field(default_factory=dict)

    @classmethod
    def load(cls, token_file: str | None, password_file: str | None) -> Auth | None:
        """None when neither file is given; AuthError for an unusable file."""
        if not token_file and not password_file:
            return None
        auth = cls()
        if token_file:
            try:
                token = Path(token_file).read_text(encoding="utf-8").strip()
            except (OSError, UnicodeDecodeError) as exc:
                raise AuthError(f"--token-file {token_file}: {exc}") from None
            if len(token) < MIN_TOKEN_CHARS or any(c.isspace() for c in token):
                raise AuthError(f"--token-file {token_file}: the token must be one word of at "
                                f"least {MIN_TOKEN_CHARS} characters")
            auth.token = token
        if password_file:
            try:
                lines = Path(password_file).read_text(encoding="utf-8").splitlines()
            except (OSError, UnicodeDecodeError) as exc:
                raise AuthError(f"--password-file {password_file}: {exc}") from None
            for number, line in enumerate(lines, 1):
                if not line.strip() or line.startswith("#"):
                    continue
                user, sep, stored = line.strip().partition(":")
                if not sep or not user or not stored.startswith("scrypt$") \
                        or stored.count("$") != 5:
                    raise AuthError(f"--password-file {password_file}:{number}: expected "
                                    "user:scrypt$N$r$p$salt$hash (halfcycle serve "
                                    "--hash-password USER)")
                auth.users[user] = stored
            if not auth.users:
                raise AuthError(f"--password-file {password_file}: no users")
        return auth

    def allows(self, header: str | None) -> bool:
        if not header:
            return False
        scheme, _, value = header.partition(" ")
        value = value.strip()
        if scheme.lower() == "bearer" and self.token is not None:
            return hmac.compare_digest(value.encode(), self.token.encode())
        if scheme.lower() == "basic" and self.users:
            try:
                user, _, password = base64.b64decode(value, validate=True).decode().partition(
                    ":")
            except (ValueError, binascii.Error, UnicodeDecodeError):
                return False
            stored = self.users.get(user)
            return stored is not None and _check(password, stored)
        return False


Receive = Callable[[], Awaitable[MutableMapping[str, Any]]]
Send = Callable[[MutableMapping[str, Any]], Awaitable[None]]
ASGIApp = Callable[[MutableMapping[str, Any], Receive, Send], Awaitable[None]]


class RequireAuth:
    """ASGI middleware: 401 unless the Authorization header carries accepted credentials."""

    def __init__(self, app: ASGIApp, auth: Auth) -> None:
        self.app = app
        self.auth = auth

    async def __call__(self, scope: MutableMapping[str, Any], receive: Receive,
                       send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        header = next((v.decode("latin-1") for k, v in scope.get("headers", [])
                       if k == b"authorization"), None)
        if self.auth.allows(header):
            await self.app(scope, receive, send)
            return
        challenge = 'Basic realm="halfcycle"' if self.auth.users else 'Bearer realm="halfcycle"'
        body = b'{"error": "authentication required"}'
        await send({"type": "http.response.start", "status": 401,
                    "headers": [(b"content-type", b"application/json"),
                                (b"www-authenticate", challenge.encode()),
                                (b"content-length", str(len(body)).encode())]})
        await send({"type": "http.response.body", "body": body})


#: Every response: the page loads only its own scripts, styles and images (no CDN, no inline
#: script), is not framed, and its types are not sniffed.
SECURITY_HEADERS = (
    (b"content-security-policy", b"default-src 'self'; img-src 'self' data:; "
                                 b"object-src 'none'; frame-ancestors 'none'; base-uri 'none'"),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
)


class SecurityHeaders:
    """ASGI middleware adding :data:`SECURITY_HEADERS` to every HTTP response."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: MutableMapping[str, Any], receive: Receive,
                       send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def with_headers(message: MutableMapping[str, Any]) -> None:
            if message["type"] == "http.response.start":
                message["headers"] = [*message.get("headers", []), *SECURITY_HEADERS]
            await send(message)

        await self.app(scope, receive, with_headers)


def new_token() -> str:
    return secrets.token_urlsafe(32)
