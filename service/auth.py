"""API keys and roles of the REST service.

A key is a random token a client sends in the ``X-API-Key`` header. The service never stores a
key itself, only its SHA-256 (FIPS 180-4) digest: keys are 256-bit random tokens
(:func:`new_key`), so a fast unsalted hash is enough to make a leaked keys file useless (common
practice for high-entropy API tokens; passwords would need a slow salted hash). A presented key
is hashed and compared with every configured digest by :func:`hmac.compare_digest`, which takes
the same time wherever the strings differ.

Keys file format, one key per line (``#`` starts a comment)::

    NAME ROLES SHA256
    broker-a      score        <64 hex digits: hash_key(the key)>
    vetting-team  score,label  <64 hex digits>
    ops           admin        <64 hex digits>

Roles: ``score`` (the scoring and plot routes), ``label`` (submit and export labels), ``admin``
(activate models; admin also holds the other two roles). ``dipshape keys new NAME --roles
score,label`` prints a fresh key once and the line to add to the keys file.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from features.errors import ParameterError
from service.errors import ServiceError

__all__ = ["ROLES", "ApiKey", "KeyRing", "hash_key", "new_key", "parse_keys"]

ROLES = ("score", "label", "admin")
"""Roles a key may hold."""

_NAME = re.compile(r"^[A-Za-z0-9_.@-]{1,64}$")
_HEX = re.compile(r"^[0-9a-f]{64}$")


def hash_key(key: str) -> str:
    """SHA-256 hex digest of a key (what the keys file holds).

    Examples
    --------
    >>> hash_key("abc")  # FIPS 180-2 appendix B.1 test vector
    'ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad'
    """
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def new_key() -> str:
    """A new random key: 32 bytes from :mod:`secrets`, URL-safe base64 (43 characters)."""
    return secrets.token_urlsafe(32)


@dataclass(frozen=True, slots=True)
class ApiKey:
    """One configured key: who it belongs to, its roles and its digest."""

    name: str
    roles: frozenset[str]
    sha256: str

    def allows(self, role: str) -> bool:
        """Whether this key may use a route that needs ``role`` (admin may use all)."""
        return role in self.roles or "admin" in self.roles


def parse_keys(lines: Iterable[str], *, where: str = "keys") -> tuple[ApiKey, ...]:
    """Parse keys-file lines (module docstring format).

    Raises
    ------
    ParameterError
        ``invalid_keys`` naming the line and what is wrong (field count, name, unknown role,
        a digest that is not 64 lower-case hex digits, a duplicated name or digest).
    """
    keys: list[ApiKey] = []
    for number, raw in enumerate(lines, start=1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        parts = line.split()
        if len(parts) != 3:
            raise ParameterError("invalid_keys", f"{where} line {number}: expected 'NAME ROLES "
                                 f"SHA256', got {len(parts)} field(s)")
        name, roles_text, digest = parts
        if not _NAME.match(name):
            raise ParameterError("invalid_keys", f"{where} line {number}: bad name {name!r} "
                                 "(letters, digits, _ . @ -; at most 64)")
        roles = frozenset(r for r in roles_text.split(",") if r)
        unknown = sorted(roles - set(ROLES))
        if not roles or unknown:
            raise ParameterError("invalid_keys", f"{where} line {number}: unknown role(s) "
                                 f"{unknown or [roles_text]}; roles are {', '.join(ROLES)}")
        if not _HEX.match(digest):
            raise ParameterError("invalid_keys", f"{where} line {number}: the key's SHA-256 "
                                 "must be 64 lower-case hex digits (store the digest, not the key)")
        if any(k.name == name or k.sha256 == digest for k in keys):
            raise ParameterError("invalid_keys", f"{where} line {number}: duplicate name or key")
        keys.append(ApiKey(name=name, roles=roles, sha256=digest))
    return tuple(keys)


@dataclass(frozen=True, slots=True)
class KeyRing:
    """The configured keys; empty means the service is open (loopback only)."""

    keys: tuple[ApiKey, ...] = ()

    @classmethod
    def load(cls, keys_file: Path | None, env_lines: str = "") -> KeyRing:
        """Keys from a keys file and from ``;``-separated lines (``DIPSHAPE_API_KEYS``).

        Raises
        ------
        ParameterError
            ``invalid_keys`` for an unreadable file or a malformed line.
        """
        lines: list[tuple[str, str]] = []
        if keys_file is not None:
            try:
                text = Path(keys_file).read_text(encoding="utf-8")
            except OSError as exc:
                raise ParameterError("invalid_keys",
                                     f"cannot read keys file {keys_file}: {exc}") from exc
            lines += [(str(keys_file), t) for t in text.splitlines()]
        keys = list(parse_keys([t for w, t in lines], where=str(keys_file)))
        for key in parse_keys(env_lines.split(";"), where="DIPSHAPE_API_KEYS"):
            if any(k.name == key.name or k.sha256 == key.sha256 for k in keys):
                raise ParameterError("invalid_keys", f"key {key.name!r} is configured twice")
            keys.append(key)
        return cls(tuple(keys))

    @property
    def open(self) -> bool:
        """True when no key is configured (every request is allowed)."""
        return not self.keys

    def authorise(self, presented: str | None, role: str) -> str | None:
        """Check a presented key for a route that needs ``role``.

        Returns
        -------
        str or None
            The key's name (None when the ring is open).

        Raises
        ------
        ServiceError
            ``missing_api_key``, ``invalid_api_key`` (401) or ``forbidden`` (403).
        """
        if self.open:
            return None
        if not presented:
            raise ServiceError("missing_api_key", "this service needs an X-API-Key header")
        digest = hash_key(presented)
        match: ApiKey | None = None
        for key in self.keys:  # no early exit: the time does not depend on which key matched
            if hmac.compare_digest(key.sha256, digest):
                match = key
        if match is None:
            raise ServiceError("invalid_api_key", "the X-API-Key is not a configured key")
        if not match.allows(role):
            raise ServiceError("forbidden", f"key {match.name!r} lacks the {role!r} role")
        return match.name
