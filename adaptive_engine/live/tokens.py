"""Bearer tokens of the HTTP service: a TOML file of ``[[token]]`` tables, secrets never stored.

The file lists who may call the service::

    [[token]]
    name = "exam-app"          # who holds it (shown in logs, never the secret)
    role = "delivery"          # "delivery": sessions; "admin": sessions, listings, releases, exposure
    sha256 = "5f0c..."         # hex SHA-256 digest of the secret's UTF-8 bytes
    created_at = "2025-..."    # optional, written by `token new`

A request carries ``Authorization: Bearer SECRET``; the service hashes the secret and looks
for the digest.  The file holds digests only: whoever reads it cannot call the service.
Secrets are 256 random bits (:func:`secrets.token_urlsafe`), so a digest cannot be turned
back into one.  :func:`new_token` adds a token and returns its secret, once.
"""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import json
import os
import re
import secrets
import stat
import tomllib
from pathlib import Path

import attrs

from ..errors import AdaptiveEngineError, Problem
from ..files import decode_input_text, read_input_bytes, write_text
from .store import now_text, shown

ROLES = ("delivery", "admin")
#: What each role may do.
ROLE_GRANTS = {"delivery": frozenset({"delivery"}), "admin": frozenset({"delivery", "admin"})}
#: Largest token file read (a few thousand tokens).
MAX_TOKEN_FILE_BYTES = 1 << 20
_KEYS = {"name", "role", "sha256", "created_at"}
_DIGEST = re.compile(r"[0-9a-f]{64}", re.ASCII)
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._@+-]{0,63}", re.ASCII)


class TokenFileError(AdaptiveEngineError):
    """The token file is missing, unreadable or malformed."""


@attrs.frozen
class Token:
    """One token of the file: who holds it, what it may do, the digest of its secret."""

    name: str
    role: str
    sha256: str

    def may(self, role: str) -> bool:
        """Whether this token may call an endpoint that needs ``role``."""
        return role in ROLE_GRANTS[self.role]


def digest_of(secret: str) -> str:
    """Hex SHA-256 digest of the secret's UTF-8 bytes (what the file keeps)."""
    return hashlib.sha256(secret.encode("utf-8", "surrogatepass")).hexdigest()


@attrs.frozen
class TokenTable:
    """The tokens of one file, looked up by secret."""

    tokens: tuple = ()

    def identify(self, secret: str) -> Token | None:
        """The token whose digest is the secret's, else None (constant time per token)."""
        digest = digest_of(secret)
        found = None
        for token in self.tokens:
            if hmac.compare_digest(token.sha256, digest):
                found = token
        return found


def read_tokens(path: str | Path) -> TokenTable:
    """Read and check a token file.

    Raises
    ------
    TokenFileError
        Every problem, as ``FILE: token N FIELD: problem``: a missing or unreadable file,
        not TOML, no ``[[token]]`` table, a key other than ``name``, ``role``, ``sha256``
        and ``created_at`` (a ``secret`` above all), a name that is not a short plain word
        or is used twice, a role other than ``delivery`` or ``admin``, a digest that is not
        64 hex characters or is used twice.
    """
    where = str(path)
    data = read_input_bytes(path, max_bytes=MAX_TOKEN_FILE_BYTES, error=TokenFileError,
                            missing=f"no token file at {where} (the service needs one; "
                                    f"make it with `adaptive-engine token new`)")
    text = decode_input_text(bytes(data), error=TokenFileError, location=where)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise TokenFileError(f"not a TOML file: {exc}", location=where) from None
    problems = [Problem(where, f"unknown top-level key {shown(k)!r}: the file holds [[token]] tables only")
                for k in doc if k != "token"]
    entries = doc.get("token")
    if not isinstance(entries, list) or not entries:
        problems.append(Problem(where, "no [[token]] table: the service would let nobody in"))
        raise TokenFileError(problems)
    tokens, names, digests = [], set(), set()
    for k, entry in enumerate(entries, start=1):
        at = f"{where}: token {k}"
        if not isinstance(entry, dict):
            problems.append(Problem(at, "not a table"))
            continue
        for key in sorted(set(entry) - _KEYS):
            why = ("secrets are never stored: keep only the sha256 digest of the secret" if key == "secret"
                   else f"unknown key (known: {', '.join(sorted(_KEYS))})")
            problems.append(Problem(f"{at} {shown(key)}", why))
        name, role, digest = entry.get("name"), entry.get("role"), entry.get("sha256")
        if not isinstance(name, str) or not _NAME.fullmatch(name):
            problems.append(Problem(f"{at} name", "a name is a letter or digit, then up to 63 letters, digits "
                                                  "or . _ @ + -"))
        elif name in names:
            problems.append(Problem(f"{at} name", f"the name {name!r} is used by another token"))
        if role not in ROLES:
            problems.append(Problem(f"{at} role", f"the role must be one of {', '.join(ROLES)}"))
        if not isinstance(digest, str) or not _DIGEST.fullmatch(digest.lower()):
            problems.append(Problem(f"{at} sha256", "the digest must be 64 hex characters (SHA-256 of the secret)"))
        elif digest.lower() in digests:
            problems.append(Problem(f"{at} sha256", "the same digest (so the same secret) is listed twice"))
        if isinstance(name, str):
            names.add(name)
        if isinstance(digest, str):
            digests.add(digest.lower())
        if not problems:
            tokens.append(Token(name=name, role=role, sha256=digest.lower()))
    if problems:
        raise TokenFileError(problems)
    return TokenTable(tokens=tuple(tokens))


def new_token(path: str | Path, *, name: str, role: str) -> tuple[Token, str]:
    """Add a token to the file at ``path`` (created if missing) and return it with its secret.

    The secret is returned once and stored nowhere; the file gets its digest.  The file is
    rewritten whole (temporary file and rename) and keeps its mode; a new file gets the
    normal mode (it holds digests only).

    Raises
    ------
    TokenFileError
        A bad name or role, a name already in the file, or a malformed existing file
        (which is then left as it is).
    """
    where = str(path)
    with _folder_lock(Path(path)):
        return _new_token(path, where, name=name, role=role)


@contextlib.contextmanager
def _folder_lock(path: Path):
    """Hold an exclusive lock on the token file's folder while it is read and rewritten.

    Two ``token new`` at once would otherwise both read the old file and the second rename
    would drop the first one's token.  The lock is ``flock`` on the folder itself (no lock
    file is left behind); where ``fcntl`` is missing (Windows) there is no lock.
    """
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not on the supported platforms
        yield
        return
    folder = path.parent if str(path.parent) else Path(".")
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # a missing folder: the write names it
        yield
        return
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def _new_token(path, where: str, *, name: str, role: str) -> tuple[Token, str]:
    if role not in ROLES:
        raise TokenFileError(f"the role must be one of {', '.join(ROLES)}, got '{shown(role)}'", location="role")
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise TokenFileError(f"'{shown(name)}' is not a token name (a letter or digit, then up to 63 letters, "
                             f"digits or . _ @ + -)", location="name")
    path = Path(path)
    existing, mode = "", None
    if path.exists():
        table = read_tokens(path)
        if any(t.name == name for t in table.tokens):
            raise TokenFileError(f"a token named {name!r} is in the file already; remove it first or "
                                 f"choose another name", location="name")
        existing = path.read_text(encoding="utf-8")
        mode = stat.S_IMODE(path.stat().st_mode)
    secret = secrets.token_urlsafe(32)
    token = Token(name=name, role=role, sha256=digest_of(secret))
    block = (f"[[token]]\nname = {json.dumps(name)}\nrole = {json.dumps(role)}\nsha256 = \"{token.sha256}\"\n"
             f"created_at = \"{now_text()}\"\n")
    if existing and not existing.endswith("\n"):
        existing += "\n"
    write_text(path, existing + ("\n" if existing else "") + block, location=where)
    if mode is not None:
        os.chmod(path, mode)
    return token, secret
