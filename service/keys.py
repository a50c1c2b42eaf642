"""API keys: who is calling. Only sha256 hashes are stored; lookups compare in constant time.

The keys file (``KEEPSET_KEYS``) reads ``clients: {<client>: {sha256: <hex>}}`` and
``admins: {<name>: {sha256: <hex>}}``. A presented key is hashed and compared with every stored
hash using ``hmac.compare_digest``, without stopping at the first match, so the time taken does
not reveal which entry (if any) matched.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import yaml

from service.policy import check_name
from service.yamlfile import parse_yaml

Role = Literal["client", "admin"]


class KeysError(ValueError):
    """A keys file that cannot be used, or a refused change to it."""


@dataclass(frozen=True)
class Identity:
    name: str
    role: Role


@dataclass(frozen=True)
class KeyRing:
    entries: tuple[tuple[str, Role, str], ...]  # (name, role, sha256 hex)

    def identify(self, key: str) -> Identity | None:
        presented = hash_key(key).encode()
        found: Identity | None = None
        for name, role, digest in self.entries:
            if hmac.compare_digest(presented, digest.encode()) and found is None:
                found = Identity(name, role)
        return found

    def names(self, role: Role) -> list[str]:
        return [n for n, r, _ in self.entries if r == role]


def hash_key(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def load_keyring(path: Path) -> KeyRing:
    data = _read(path)
    entries: list[tuple[str, Role, str]] = []
    for section, role in (("clients", "client"), ("admins", "admin")):
        for name, spec in (data.get(section) or {}).items():
            digest = spec.get("sha256") if isinstance(spec, Mapping) else None
            if not isinstance(digest, str) or len(digest) != 64:
                raise KeysError(f"{path}: {section}.{name}: expected {{sha256: <64 hex digits>}}")
            entries.append((str(name), role, digest.lower()))  # type: ignore[arg-type]
    return KeyRing(tuple(entries))


def _read(path: Path) -> dict[str, Any]:
    if not path.exists():
        raise KeysError(f"{path}: the keys file does not exist")
    data = parse_yaml(path.read_bytes()) or {}
    if not isinstance(data, Mapping) or set(data) - {"clients", "admins"}:
        raise KeysError(f"{path}: expected a mapping with 'clients' and 'admins'")
    return dict(data)


def add_key(path: Path, name: str, role: Role = "client", rotate: bool = False) -> str:
    """Make a new key for ``name``, store its hash in ``path`` and return the plain key once."""
    check_name(name)
    data = _read(path) if path.exists() else {}
    section = "clients" if role == "client" else "admins"
    entries = dict(data.get(section) or {})
    if name in entries and not rotate:
        raise KeysError(f"{name} already has a key; pass --rotate to replace it")
    key = "ks_" + secrets.token_urlsafe(32)
    entries[name] = {"sha256": hash_key(key)}
    data[section] = entries
    path.write_text(yaml.safe_dump(data, sort_keys=True), encoding="utf-8")
    return key
