"""API keys: who is calling, and until when. Only sha256 hashes are stored; lookups compare in
constant time.

The keys file (``KEEPSET_KEYS``) reads ``clients: {<client>: {sha256: <hex>}}`` and
``admins: {<name>: {sha256: <hex>}}``. An entry may also carry ``expires`` (when its key stops
working) and ``previous`` (keys still accepted while callers move to a rotated key, each with
``until``)::

    clients:
      usher-desk:
        sha256: 9f...        # the current key
        expires: 2027-03-01T00:00:00Z
        previous:
          - {sha256: 12..., until: 2026-12-04T12:00:00Z}

A presented key is hashed and compared with every stored hash using ``hmac.compare_digest``,
without stopping at the first match, so the time taken does not reveal which entry (if any)
matched. Times without a zone are UTC.
"""

from __future__ import annotations

import datetime as dt
import functools
import hashlib
import hmac
import math
import secrets
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import yaml

from service.policy import check_name
from service.yamlfile import parse_yaml

Role = Literal["client", "admin"]
_SECTIONS: tuple[tuple[str, Role], ...] = (("clients", "client"), ("admins", "admin"))
# How long a rotated-out key keeps working unless the rotation says otherwise (common practice
# is a window long enough for every caller to pick up the new secret).
DEFAULT_OVERLAP = dt.timedelta(hours=24)


class KeysError(ValueError):
    """A keys file that cannot be used, or a refused change to it."""


@dataclass(frozen=True)
class Identity:
    name: str
    role: Role


@dataclass(frozen=True)
class StoredKey:
    """One accepted hash: the name's current key, or a previous one during a rotation."""

    name: str
    role: Role
    sha256: str
    not_after: dt.datetime | None  # None: no expiry
    current: bool


@dataclass(frozen=True)
class KeyRing:
    entries: tuple[StoredKey, ...]

    def match(self, key: str) -> StoredKey | None:
        """The entry whose hash is the key's, expired or not; every entry is compared."""
        presented = hash_key(key).encode()
        found: StoredKey | None = None
        for entry in self.entries:
            if hmac.compare_digest(presented, entry.sha256.encode()) and found is None:
                found = entry
        return found

    def identify(self, key: str, now: dt.datetime | None = None) -> Identity | None:
        """Who presents ``key`` at ``now`` (default: the current time; without a zone, UTC), or
        None for an unknown or expired key."""
        entry = self.match(key)
        if entry is None:
            return None
        identity, deadline = self._identities[entry]
        if now is not None and now.tzinfo is None:
            now = now.replace(tzinfo=dt.UTC)  # .timestamp() would read it as local time
        if (time.time() if now is None else now.timestamp()) >= deadline:
            return None
        return identity

    @functools.cached_property
    def _identities(self) -> dict[StoredKey, tuple[Identity, float]]:
        """Each entry's identity and the epoch second its key stops working (inf: never). Every
        request is identified: a float comparison with ``time.time()`` costs a microsecond where
        making an aware datetime now and comparing two took about seven, on the caches a pick
        has just emptied; a float holds an epoch second to well under a microsecond."""
        return {
            e: (
                Identity(e.name, e.role),
                math.inf if e.not_after is None else e.not_after.timestamp(),
            )
            for e in self.entries
        }

    def names(self, role: Role) -> list[str]:
        return [e.name for e in self.entries if e.role == role and e.current]

    def describe(self, now: dt.datetime, warn_days: float) -> list[dict[str, Any]]:
        """Per name: when its key expires, whether that is near, and the previous keys still
        accepted (a rotation in progress). What ``GET /v1/routes`` reports under ``keys``."""
        out = []
        for entry in self.entries:
            if not entry.current:
                continue
            rotating = [
                _iso(e.not_after)
                for e in self.entries
                if not e.current and e.name == entry.name and e.role == entry.role
                if e.not_after is not None and not expired(e, now)
            ]
            left = None
            if entry.not_after is not None:
                left = (entry.not_after - now).total_seconds() / 86400
            out.append(
                {
                    "name": entry.name,
                    "role": entry.role,
                    "expires": None if entry.not_after is None else _iso(entry.not_after),
                    "days_left": None if left is None else round(left, 2),
                    "expired": left is not None and left <= 0,
                    "near_expiry": left is not None and left <= warn_days,
                    "previous_accepted_until": rotating,
                }
            )
        return out


def expired(entry: StoredKey, now: dt.datetime) -> bool:
    return entry.not_after is not None and now >= entry.not_after


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def hash_key(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def load_keyring(path: Path) -> KeyRing:
    data = _read(path)
    entries: list[StoredKey] = []
    for section, role in _SECTIONS:
        for name, spec in (data.get(section) or {}).items():
            where = f"{path}: {section}.{name}"
            if not isinstance(spec, Mapping) or set(spec) - {"sha256", "expires", "previous"}:
                raise KeysError(
                    f"{where}: expected {{sha256: <64 hex digits>, expires?, previous?}}"
                )
            entries.append(
                StoredKey(
                    str(name),
                    role,
                    _digest(spec.get("sha256"), where),
                    _time(spec.get("expires"), f"{where}.expires"),
                    current=True,
                )
            )
            previous = spec.get("previous") or []
            if not isinstance(previous, list):
                raise KeysError(f"{where}.previous: expected a list of {{sha256, until}}")
            for i, old in enumerate(previous):
                at = f"{where}.previous[{i}]"
                if not isinstance(old, Mapping) or set(old) != {"sha256", "until"}:
                    raise KeysError(f"{at}: expected {{sha256: <64 hex digits>, until: <time>}}")
                until = _time(old["until"], f"{at}.until")
                entries.append(StoredKey(str(name), role, _digest(old["sha256"], at), until, False))
    return KeyRing(tuple(entries))


def _digest(value: Any, where: str) -> str:
    if not isinstance(value, str) or len(value) != 64:
        raise KeysError(f"{where}: expected {{sha256: <64 hex digits>}}")
    try:
        bytes.fromhex(value)
    except ValueError:
        raise KeysError(f"{where}: sha256 is not hexadecimal") from None
    return value.lower()


def _time(value: Any, where: str) -> dt.datetime | None:
    """A time from YAML: a timestamp, a date (its start, UTC) or ISO 8601 text; None if unset."""
    if value is None:
        return None
    if isinstance(value, str):
        try:
            value = dt.datetime.fromisoformat(value)
        except ValueError:
            raise KeysError(f"{where}: expected an ISO 8601 time, got {value!r}") from None
    if isinstance(value, dt.datetime):
        return value if value.tzinfo is not None else value.replace(tzinfo=dt.UTC)
    if isinstance(value, dt.date):
        return dt.datetime(value.year, value.month, value.day, tzinfo=dt.UTC)
    raise KeysError(f"{where}: expected a time such as 2027-03-01T00:00:00Z, got {value!r}")


def _iso(moment: dt.datetime) -> str:
    return moment.astimezone(dt.UTC).isoformat().replace("+00:00", "Z")


def _read(path: Path) -> dict[str, Any]:
    if not path.exists():
        raise KeysError(f"{path}: the keys file does not exist")
    data = parse_yaml(path.read_bytes()) or {}
    if not isinstance(data, Mapping) or set(data) - {"clients", "admins"}:
        raise KeysError(f"{path}: expected a mapping with 'clients' and 'admins'")
    return dict(data)


def add_key(
    path: Path,
    name: str,
    role: Role = "client",
    rotate: bool = False,
    overlap: dt.timedelta = DEFAULT_OVERLAP,
    expires_in: dt.timedelta | None = None,
    now: dt.datetime | None = None,
) -> str:
    """Make a new key for ``name``, store its hash in ``path`` and return the plain key once.

    With ``rotate``, the name's current key stays accepted for ``overlap`` more (as a previous
    key; rotated-out keys already expired are dropped), so callers can move over without a gap.
    ``expires_in`` sets when the new key itself stops working."""
    check_name(name)
    now = now or utc_now()
    data: dict[str, Any] = {}
    if path.exists():
        load_keyring(path)  # refuse to rewrite a file that the service could not read
        data = _read(path)
    section = "clients" if role == "client" else "admins"
    entries = dict(data.get(section) or {})
    if name in entries and not rotate:
        raise KeysError(f"{name} already has a key; pass --rotate to replace it")
    if rotate and name not in entries:
        raise KeysError(f"{name} has no key to rotate; add one without --rotate")
    if overlap < dt.timedelta(0):
        raise KeysError("the rotation overlap cannot be negative")
    key = "ks_" + secrets.token_urlsafe(32)
    entry: dict[str, Any] = {"sha256": hash_key(key)}
    if expires_in is not None:
        if expires_in <= dt.timedelta(0):
            raise KeysError("a key must expire in the future")
        entry["expires"] = _iso(now + expires_in)
    if rotate:
        # The overlap bounds every older key too: a rotation with no overlap (a leaked key)
        # ends them all at once.
        end = now + overlap
        old = entries[name]
        kept = []
        for previous in old.get("previous") or []:
            until = min(_time(previous["until"], "until") or end, end)
            if until > now:
                kept.append({"sha256": previous["sha256"], "until": _iso(until)})
        until = min(_time(old.get("expires"), "expires") or end, end)
        if until > now:
            kept.append({"sha256": old["sha256"], "until": _iso(until)})
        if kept:
            entry["previous"] = kept
    entries[name] = entry
    data[section] = entries
    _write_atomically(path, yaml.safe_dump(data, sort_keys=True))
    return key


def _write_atomically(path: Path, text: str) -> None:
    """A running service may read the file at any moment: never let it see half of it."""
    temporary = path.with_name(f".{path.name}.tmp")
    temporary.write_text(text, encoding="utf-8")
    temporary.replace(path)
