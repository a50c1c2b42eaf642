"""The policy registry: a folder of published policy versions, their lock, and the routes.

Loading never raises for a bad file: every file is either loaded or refused with a reason that
names it, and the result is an immutable :class:`RegistrySnapshot` that the HTTP layer swaps in
whole. A published version never changes: ``published.lock`` records the sha256 of every
published file, and a file whose bytes no longer match is refused as tampered. Files not in the
lock are refused as unpublished (``keepset policy publish`` adds them). Fallback references must
resolve to loaded versions, without cycles.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from service.policy import Policy, PolicyFileError, format_ref, parse_ref, policy_from_data
from service.routing import Arm, Route, RoutesError, parse_routes
from service.sampling import Chain
from service.yamlfile import YamlFileError, parse_yaml

LOCK_FILE = "published.lock"
ROUTES_FILE = "routes.yaml"

Ref = tuple[str, int]


@dataclass(frozen=True)
class Refusal:
    file: str
    reason: str

    def line(self) -> str:
        return f"{self.file}: {self.reason}"


@dataclass(frozen=True)
class RegistrySnapshot:
    """Everything loaded from one registry folder at one moment."""

    root: Path
    policies: Mapping[Ref, Policy]
    chains: Mapping[Ref, Chain]
    routes: Mapping[str, Route]
    loaded: tuple[str, ...]
    refused: tuple[Refusal, ...]
    fingerprint: str
    lock: Mapping[Ref, str] = field(default_factory=dict)

    @property
    def valid(self) -> bool:
        return not self.refused

    def problem_lines(self) -> list[str]:
        return [r.line() for r in self.refused]

    def policy_count(self) -> int:
        return len(self.policies)

    def route_for(self, client: str) -> Route | None:
        return self.routes.get(client)

    def policy(self, ref: Ref) -> Policy:
        return self.policies[ref]

    def chain(self, ref: Ref) -> Chain:
        return self.chains[ref]

    def find(self, name: str, version: int) -> Policy | None:
        return self.policies.get((name, version))

    def all_policies(self) -> list[Policy]:
        return [self.policies[ref] for ref in sorted(self.policies)]

    def versions_of(self, name: str) -> list[Policy]:
        return [p for p in self.all_policies() if p.name == name]

    def describe(self, policy: Policy, full: bool = False) -> dict[str, Any]:
        if full:
            return {**policy.model_dump(mode="json"), "sha256": self.lock.get(_ref(policy))}
        return {
            "name": policy.name,
            "version": policy.version,
            "owner": policy.owner,
            "summary": policy.summary,
        }

    def describe_routes(self) -> dict[str, Any]:
        return {
            "clients": {
                client: {
                    "arms": [
                        {
                            "policy": format_ref(*arm.policy),
                            "weight": arm.weight,
                            "label": arm.public_label(i),
                        }
                        for i, arm in enumerate(route.arms)
                    ],
                    "shadow": [format_ref(*ref) for ref in route.shadow],
                    **({"guard": route.guard.describe()} if route.guard is not None else {}),
                    **(
                        {"capture": {"rate": route.capture.rate, "max_mb": route.capture.max_mb}}
                        if route.capture is not None
                        else {}
                    ),
                }
                for client, route in sorted(self.routes.items())
            }
        }

    @staticmethod
    def fingerprint_of(root: Path) -> str:
        """Changes whenever a file under the registry folder is added, removed or rewritten."""
        digest = hashlib.sha256()
        if root.is_dir():
            for path in sorted(p for p in root.rglob("*") if p.is_file()):
                stat = path.stat()
                digest.update(
                    f"{path.relative_to(root)}\0{stat.st_mtime_ns}\0{stat.st_size}\n".encode()
                )
        return digest.hexdigest()


@dataclass(frozen=True)
class ReloadReport:
    ok: bool
    loaded: tuple[str, ...]
    refused: tuple[Refusal, ...]

    def as_dict(self) -> dict[str, Any]:
        return {
            "loaded": list(self.loaded),
            "refused": [{"file": r.file, "reason": r.reason} for r in self.refused],
        }


def _ref(policy: Policy) -> Ref:
    return policy.name, policy.version


def sha256_of(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def read_lock(root: Path) -> tuple[dict[Ref, str], list[Refusal]]:
    """The lock's entries, and a refusal for every line that is not ``name version sha256``."""
    path = root / LOCK_FILE
    if not path.exists():
        return {}, []
    entries: dict[Ref, str] = {}
    problems = []
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        text = line.split("#", 1)[0].strip()
        if not text:
            continue
        parts = text.split()
        if len(parts) != 3 or not parts[1].isdigit() or len(parts[2]) != 64:
            problems.append(Refusal(f"{LOCK_FILE}:{number}", "expected 'name version sha256'"))
            continue
        key = (parts[0], int(parts[1]))
        if key in entries:
            problems.append(Refusal(f"{LOCK_FILE}:{number}", f"{format_ref(*key)} is listed twice"))
            continue
        entries[key] = parts[2].lower()
    return entries, problems


def policy_files(root: Path) -> list[Path]:
    """Every ``<name>/<version>.yaml`` candidate under the registry folder."""
    if not root.is_dir():
        return []
    return sorted(
        p
        for folder in root.iterdir()
        if folder.is_dir() and not folder.name.startswith(".")
        for p in folder.iterdir()
        if p.suffix in (".yaml", ".yml") and p.is_file()
    )


def read_policy_file(root: Path, path: Path) -> Policy:
    """Parse and validate one policy file, including that its path matches its fields."""
    rel = str(path.relative_to(root))
    if path.suffix != ".yaml" or not path.stem.isdigit() or path.stem.startswith("0"):
        raise PolicyFileError(
            rel, [("", "policy files are named <version>.yaml, version 1, 2, ...")]
        )
    try:
        data = parse_yaml(path.read_bytes())
    except YamlFileError as exc:
        raise PolicyFileError(rel, [("", str(exc))]) from None
    policy = policy_from_data(data, rel)
    problems = []
    if policy.name != path.parent.name:
        problems.append(
            ("name", f"{policy.name!r} must equal the folder name {path.parent.name!r}")
        )
    if policy.version != int(path.stem):
        problems.append(("version", f"{policy.version} must equal the file name {path.name!r}"))
    if problems:
        raise PolicyFileError(rel, problems)
    return policy


def readable_root(root: Path) -> Path:
    """The folder to read a registry from. A Kubernetes ConfigMap volume keeps its files in a
    timestamped folder that ``..data`` points to, and an update swaps ``..data`` in one rename:
    reading every file through ``..data`` resolved once gives one version of the whole registry,
    never old files beside new ones."""
    data = root / "..data"
    return data.resolve() if data.is_symlink() else root


def load_registry(root: Path) -> RegistrySnapshot:
    root = Path(root)
    try:
        fingerprint = RegistrySnapshot.fingerprint_of(root)
    except OSError:  # a file that vanished mid-walk: the next poll sees the folder changed
        fingerprint = ""
    if not root.is_dir():
        refusal = Refusal(str(root), "the registry folder does not exist")
        return RegistrySnapshot(root, {}, {}, {}, (), (refusal,), fingerprint)
    try:
        return _load(root, readable_root(root), fingerprint)
    except OSError as exc:  # a file that vanished mid-read (an old ConfigMap folder removed)
        refusal = Refusal(str(root), f"the registry could not be read: {exc}")
        return RegistrySnapshot(root, {}, {}, {}, (), (refusal,), fingerprint)


def _load(root: Path, source: Path, fingerprint: str) -> RegistrySnapshot:
    refused: list[Refusal] = []
    lock, lock_problems = read_lock(source)
    refused += lock_problems
    candidates: dict[Ref, tuple[str, Policy]] = {}
    seen_files: set[Ref] = set()
    for path in policy_files(source):
        rel = str(path.relative_to(source))
        data = path.read_bytes()
        if path.stem.isdigit():
            key = (path.parent.name, int(path.stem))
            seen_files.add(key)
            published = lock.get(key)
            if published is None:
                refused.append(
                    Refusal(
                        rel, "not published: run 'keepset policy publish' to add it to the lock"
                    )
                )
                continue
            if published != sha256_of(data):
                refused.append(
                    Refusal(
                        rel,
                        "tampered: its content differs from its published.lock entry; a published "
                        "version never changes, publish a new version instead",
                    )
                )
                continue
        try:
            policy = read_policy_file(source, path)
        except PolicyFileError as exc:
            refused.append(
                Refusal(rel, "; ".join(f"{f}: {m}" if f else m for f, m in exc.problems))
            )
            continue
        candidates[_ref(policy)] = (rel, policy)
    for key in sorted(set(lock) - seen_files):
        refused.append(
            Refusal(f"{key[0]}/{key[1]}.yaml", "listed in published.lock but the file is missing")
        )
    policies, chains, fallback_refusals = _link_fallbacks(candidates)
    refused += fallback_refusals
    routes, route_refusals = _load_routes(source, policies)
    refused += route_refusals
    loaded = tuple(rel for ref, (rel, _) in sorted(candidates.items()) if ref in policies)
    return RegistrySnapshot(
        root, policies, chains, routes, loaded, tuple(refused), fingerprint, dict(lock)
    )


def _link_fallbacks(
    candidates: Mapping[Ref, tuple[str, Policy]],
) -> tuple[dict[Ref, Policy], dict[Ref, Chain], list[Refusal]]:
    refused: list[Refusal] = []
    bad: set[Ref] = set()
    for ref, (rel, policy) in candidates.items():
        seen = [ref]
        target = policy.fallback_ref
        while target is not None:
            if target not in candidates:
                refused.append(
                    Refusal(rel, f"fallback: {format_ref(*target)} is not a loaded policy version")
                )
                bad.add(ref)
                break
            if target in seen:
                cycle = " -> ".join(format_ref(*r) for r in [*seen, target])
                refused.append(Refusal(rel, f"fallback: the fallbacks form a cycle: {cycle}"))
                bad.add(ref)
                break
            seen.append(target)
            target = candidates[target][1].fallback_ref
    policies = {ref: p for ref, (_, p) in candidates.items() if ref not in bad}
    chains: dict[Ref, Chain] = {}

    def linked(ref: Ref) -> Chain:
        if ref not in chains:
            policy = policies[ref]
            fb = policy.fallback_ref
            chains[ref] = policy.parsed_chain.with_fallback(linked(fb) if fb else None)
        return chains[ref]

    for ref in policies:
        linked(ref)
    return policies, chains, refused


def _load_routes(
    root: Path, policies: Mapping[Ref, Policy]
) -> tuple[dict[str, Route], list[Refusal]]:
    path = root / ROUTES_FILE
    if not path.exists():
        return {}, [Refusal(ROUTES_FILE, "missing: no client can be served without routes")]
    try:
        data = parse_yaml(path.read_bytes())
        return parse_routes(data, set(policies))
    except (YamlFileError, RoutesError) as exc:
        return {}, [Refusal(ROUTES_FILE, str(exc))]


def reload_registry(current: RegistrySnapshot, root: Path) -> tuple[RegistrySnapshot, ReloadReport]:
    """Load again; keep ``current`` unless the new load is valid throughout."""
    fresh = load_registry(root)
    report = ReloadReport(fresh.valid, fresh.loaded, fresh.refused)
    return (fresh if fresh.valid else current), report


__all__ = [
    "Arm",
    "Ref",
    "RegistrySnapshot",
    "ReloadReport",
    "Route",
    "load_registry",
    "parse_ref",
    "reload_registry",
]
