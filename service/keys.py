"""API keys: created once, stored as salted scrypt hashes, checked on every request.

A key's secret looks like ``snd_<id>_<random>``. The 12-hex-digit id is public
(``sounding keys list`` shows it) and finds the key's row, so a request costs
one scrypt check, not one per stored key; the random part carries 256 bits
from :mod:`secrets`, and only ``scrypt(secret, salt)`` with a per-key random
salt is written to disk. Keys live in their own SQLite file (``keys.db`` in
the index folder by default, mode 0600), apart from the index, so rebuilding
an index never loses them.

A successful check is remembered in memory under the SHA-256 of the secret,
so a key pays scrypt once per process; but the key's row is read on every
request (one primary-key lookup), so ``sounding keys revoke`` takes effect at
once in a running service. An unknown id costs one scrypt too (against a dummy
hash), so timing does not tell which ids exist; repeated failures of one id
are held back cheaply (:mod:`.backoff`).

An act-for key may claim only its ``act_for_groups``. Keys files made before
that column existed are migrated in place; their act-for keys get no list,
which means no group (fail-closed) until they are re-created.
"""

from __future__ import annotations

import builtins
import dataclasses
import hashlib
import hmac
import json
import re
import secrets
import sqlite3
import threading
import time
from collections import OrderedDict
from collections.abc import Iterable
from pathlib import Path

from sounding.indexer.access import parse_groups
from sounding.indexer.errors import AccessError, IndexStoreError
from sounding.indexer.store import open_side_database

from .backoff import FailureGate, TooManyAttempts

FILENAME = "keys.db"
SCOPES = ("read", "write", "admin")  # each includes the ones before it
PREFIX = "snd_"
NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
MAX_GROUPS = 64
_SECRET = re.compile(r"^snd_([0-9a-f]{12})_([A-Za-z0-9_-]{43})$")

# scrypt cost: N=2^14, r=8, p=1 is the interactive-login setting of Percival's scrypt
# paper ("Stronger key derivation via sequential memory-hard functions", 2009); RFC 7914
# section 2 says r=8, p=1 "appear to yield good results". 128*r*N = 16 MiB and 34-60 ms per
# check on the (shared) development machine, measured with hashlib.scrypt. The secret is 256
# random bits, so the cost is a second line of defence for a stolen keys file, not the first.
SCRYPT_N = 2**14
SCRYPT_R = 8
SCRYPT_P = 1
SCRYPT_DKLEN = 32
SALT_BYTES = 16
# Checks of unknown secrets are never cached, so each costs a full scrypt: at most this many
# run at once, so a flood of bad keys costs bounded memory (16 MiB each) and CPU.
_CONCURRENT_CHECKS = threading.BoundedSemaphore(2)
# A check that cannot start within this long is refused (429) rather than holding a worker.
# Long enough that valid keys arriving together (clients reconnecting after a restart, each
# secret checked once) all get through on a busy machine: scrypt takes 50-500 ms here.
_CHECK_WAIT_SECONDS = 10.0
_CACHE_SIZE = 1024

_SCHEMA = """
CREATE TABLE IF NOT EXISTS keys (
    id TEXT PRIMARY KEY,
    name TEXT NOT NULL,
    scope TEXT NOT NULL CHECK (scope IN ('read', 'write', 'admin')),
    groups TEXT NOT NULL,
    act_for INTEGER NOT NULL CHECK (act_for IN (0, 1)),
    act_for_groups TEXT,
    salt BLOB NOT NULL,
    hash BLOB NOT NULL,
    scrypt_n INTEGER NOT NULL,
    scrypt_r INTEGER NOT NULL,
    scrypt_p INTEGER NOT NULL,
    created_at REAL NOT NULL,
    revoked_at REAL
);
-- A name belongs to one live key at a time; a revoked key's name may be reused.
CREATE UNIQUE INDEX IF NOT EXISTS keys_live_name ON keys(name) WHERE revoked_at IS NULL;
"""
_COLUMNS = "id, name, scope, groups, act_for, created_at, revoked_at, act_for_groups"


def scope_rank(scope: str) -> int:
    """0 for read, 1 for write, 2 for admin; AccessError for anything else."""
    try:
        return SCOPES.index(scope)
    except ValueError:
        raise AccessError(f"unknown scope {scope!r}; use one of {', '.join(SCOPES)}") from None


def check_groups(groups: str | Iterable[str] | None, where: str = "groups") -> frozenset[str]:
    """Group names, validated: a comma-separated string or an iterable; '' means none.

    The pattern is the one document groups use (``indexer.access.GROUP_PATTERN``).
    """
    if groups is None or (isinstance(groups, str) and not groups.strip()):
        return frozenset()
    try:
        names = parse_groups(groups if isinstance(groups, str) else builtins.list(groups), where)
    except ValueError as exc:
        raise AccessError(str(exc)) from exc
    if len(names) > MAX_GROUPS:
        raise AccessError(f"{where}: {len(names)} groups; at most {MAX_GROUPS} are accepted")
    return frozenset(names)


def scrypt(
    secret: str, salt: bytes, n: int = SCRYPT_N, r: int = SCRYPT_R, p: int = SCRYPT_P
) -> bytes:
    """The stored form of a secret."""
    return hashlib.scrypt(
        secret.encode("utf-8"),
        salt=salt,
        n=n,
        r=r,
        p=p,
        dklen=SCRYPT_DKLEN,
        maxmem=256 * r * n,  # twice the 128*r*N scrypt needs; OpenSSL's default is 32 MiB
    )


def key_id_of(secret: str) -> str | None:
    """The public id inside a secret, or None when it is not a sounding key."""
    match = _SECRET.match(secret)
    return match.group(1) if match else None


@dataclasses.dataclass(frozen=True)
class KeyRecord:
    """What is known about a key. Never holds its secret or hash."""

    id: str
    name: str
    scope: str
    groups: frozenset[str]
    act_for: bool
    created_at: float
    revoked_at: float | None = None
    act_for_groups: frozenset[str] = frozenset()  # what an act-for key may claim

    @property
    def revoked(self) -> bool:
        return self.revoked_at is not None

    def to_json(self) -> dict:
        return {
            "id": self.id,
            "name": self.name,
            "scope": self.scope,
            "groups": sorted(self.groups),
            "act_for": self.act_for,
            "act_for_groups": sorted(self.act_for_groups),
            "created_at": _iso(self.created_at),
            "revoked_at": _iso(self.revoked_at) if self.revoked_at is not None else None,
        }


def _iso(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


def _record(row: tuple) -> KeyRecord:
    id_, name, scope, groups, act_for, created_at, revoked_at, act_for_groups = row
    return KeyRecord(
        id_,
        name,
        scope,
        frozenset(json.loads(groups)),
        bool(act_for),
        created_at,
        revoked_at,
        # NULL: an act-for key from before the column; it may claim no group (fail-closed).
        frozenset(json.loads(act_for_groups)) if act_for_groups else frozenset(),
    )


def _migrate(conn: sqlite3.Connection) -> None:
    """Add the act_for_groups column to a keys file made before it existed."""
    columns = {row[1] for row in conn.execute("PRAGMA table_info(keys)")}
    if "act_for_groups" in columns:
        return
    try:
        conn.execute("ALTER TABLE keys ADD COLUMN act_for_groups TEXT")
    except sqlite3.OperationalError as exc:  # another process added it first
        if "duplicate column" not in str(exc):
            raise


class KeyStore:
    """The keys of one service, in one SQLite file. Safe to share between threads."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self._lock = threading.Lock()
        self._verified: OrderedDict[bytes, str] = OrderedDict()  # sha256(secret) -> key id
        self.failures = FailureGate()
        self.conn = open_side_database(self.path, _SCHEMA, "keys file", owner_only=True)
        try:
            _migrate(self.conn)
        except sqlite3.Error as exc:
            self.conn.close()
            raise IndexStoreError(f"cannot upgrade keys file {self.path}: {exc}") from exc
        # What an unknown id is checked against, so it costs what a known one does.
        self._dummy = (secrets.token_bytes(SALT_BYTES), bytes(SCRYPT_DKLEN))

    def close(self) -> None:
        with self._lock:
            self.conn.close()

    def __enter__(self) -> KeyStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def create(
        self,
        name: str,
        scope: str,
        groups: str | Iterable[str] | None = None,
        act_for: bool = False,
        act_for_groups: str | Iterable[str] | None = None,
    ) -> tuple[KeyRecord, str]:
        """Make a key. Returns its record and its secret, which is never shown again.

        ``act_for_groups``: the only groups an act-for key may claim for an end user.
        """
        if not isinstance(name, str) or not NAME_PATTERN.match(name):
            raise AccessError(
                f"key name {name!r} is not valid: use letters, digits, '.', '_' or '-', "
                "starting with a letter or digit, at most 64"
            )
        scope_rank(scope)
        group_set = check_groups(groups)
        claimable = check_groups(act_for_groups, "act-for groups")
        if claimable and not act_for:
            raise AccessError("act-for groups are for keys with the act-for right (--act-for)")
        key_id = secrets.token_hex(6)
        secret = f"{PREFIX}{key_id}_{secrets.token_urlsafe(32)}"
        salt = secrets.token_bytes(SALT_BYTES)
        digest = scrypt(secret, salt)
        record = KeyRecord(
            key_id, name, scope, group_set, bool(act_for), time.time(), None, claimable
        )
        with self._lock:
            try:
                self.conn.execute(
                    "INSERT INTO keys (id, name, scope, groups, act_for, act_for_groups, salt, "
                    "hash, scrypt_n, scrypt_r, scrypt_p, created_at) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (
                        key_id,
                        name,
                        scope,
                        json.dumps(sorted(group_set)),
                        int(record.act_for),
                        json.dumps(sorted(claimable)),
                        salt,
                        digest,
                        SCRYPT_N,
                        SCRYPT_R,
                        SCRYPT_P,
                        record.created_at,
                    ),
                )
            except sqlite3.IntegrityError as exc:
                raise AccessError(
                    f"a key named {name!r} exists already; revoke it first "
                    f"(`sounding keys revoke {name}`) or choose another name"
                ) from exc
            except sqlite3.Error as exc:
                raise IndexStoreError(f"cannot write keys file {self.path}: {exc}") from exc
        return record, secret

    def list(self, include_revoked: bool = True) -> builtins.list[KeyRecord]:
        """Every key, oldest first; no secrets or hashes."""
        where = "" if include_revoked else " WHERE revoked_at IS NULL"
        with self._lock:
            rows = self.conn.execute(
                f"SELECT {_COLUMNS} FROM keys{where} ORDER BY created_at, id"
            ).fetchall()
        return [_record(r) for r in rows]

    def revoke(self, name_or_id: str) -> KeyRecord:
        """Revoke the live key of that name, or the key of that id. Idempotent by id."""
        with self._lock:
            row = self.conn.execute(
                f"SELECT {_COLUMNS} FROM keys WHERE id = ? OR (name = ? AND revoked_at IS NULL) "
                "ORDER BY id = ? DESC LIMIT 1",
                (name_or_id, name_or_id, name_or_id),
            ).fetchone()
            if row is None:
                was = self.conn.execute(
                    "SELECT 1 FROM keys WHERE name = ? LIMIT 1", (name_or_id,)
                ).fetchone()
                if was:
                    raise AccessError(f"key {name_or_id!r} is revoked already")
                raise AccessError(
                    f"no key named {name_or_id!r} or with that id; see `sounding keys list`"
                )
            record = _record(row)
            if record.revoked:
                return record
            now = time.time()
            self.conn.execute("UPDATE keys SET revoked_at = ? WHERE id = ?", (now, record.id))
            for digest in [d for d, k in self._verified.items() if k == record.id]:
                del self._verified[digest]
        return dataclasses.replace(record, revoked_at=now)

    def authenticate(self, secret: str) -> KeyRecord:
        """The live key whose secret this is, or AccessError saying why not.

        The row is read on every call, so revocation counts at once; scrypt runs
        only the first time a secret is seen by this process. TooManyAttempts
        (an AccessError) when the check is held back: see :mod:`.backoff`.
        """
        key_id = key_id_of(secret)
        if key_id is None:
            raise AccessError(f"not a sounding key: keys look like {PREFIX}<id>_<secret>")
        with self._lock:
            row = self.conn.execute(
                f"SELECT {_COLUMNS}, salt, hash, scrypt_n, scrypt_r, scrypt_p FROM keys "
                "WHERE id = ?",
                (key_id,),
            ).fetchone()
        n_columns = _COLUMNS.count(",") + 1
        record = None if row is None else _record(row[:n_columns])
        if row is None:
            (salt, stored), (n, r, p) = self._dummy, (SCRYPT_N, SCRYPT_R, SCRYPT_P)
        else:
            salt, stored, n, r, p = row[n_columns:]
        fingerprint = hashlib.sha256(secret.encode("utf-8")).digest()
        with self._lock:
            known = row is not None and self._verified.get(fingerprint) == key_id
            if known:
                self._verified.move_to_end(fingerprint)
        if not known:
            self.failures.admit(key_id)
            if not _CONCURRENT_CHECKS.acquire(timeout=_CHECK_WAIT_SECONDS):
                raise TooManyAttempts(
                    "too many key checks in progress: try again shortly", _CHECK_WAIT_SECONDS
                )
            try:
                candidate = scrypt(secret, salt, n, r, p)
            finally:
                _CONCURRENT_CHECKS.release()
            matched = hmac.compare_digest(candidate, stored)  # for unknown ids too: same cost
            if record is None or not matched:
                self.failures.failed(key_id)
                raise AccessError("key not recognised: unknown id or wrong secret")
            self.failures.succeeded(key_id)
        assert record is not None  # a cached or matched secret has a row
        # Only a holder of the secret learns that the key was revoked.
        if record.revoked:
            raise AccessError(
                f"key {record.name!r} ({record.id}) was revoked on {_iso(record.revoked_at)}; "
                "ask an administrator for a new one"
            )
        if not known:
            with self._lock:
                self._verified[fingerprint] = key_id
                while len(self._verified) > _CACHE_SIZE:
                    self._verified.popitem(last=False)
        return record
