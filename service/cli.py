"""The ``keepset`` command: serve, check and publish policies, diff versions, add keys.

keepset serve [--port 8411] [--workers 2] ...     run the service (flags = KEEPSET_* variables)
keepset policy check [DIR]                        exit 1 and list every problem in a registry
keepset policy publish DIR NAME                   add NAME's next version to published.lock
keepset policy diff NAME@A NAME@B [--policies DIR]
keepset policy schema [DIR]                       rewrite DIR/policy.schema.json
keepset keys add CLIENT [--keys FILE] [--admin] [--rotate [--overlap-hours H]] [--expires-days D]
keepset experiment report [--url URL] [--key KEY] [--client NAME] [--json]
keepset policy preview NAME@V [NAME@V ...] (--capture PATH ... | --prompts FILE) [--seed N]
        [--json FILE|-] [--html FILE] [--sweep FIELD=START:STOP:STEP] [--budget N] [--rows N]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import secrets
import shutil
import sys
import tempfile
from pathlib import Path
from typing import Any

from service.keys import KeysError, add_key
from service.policy import PolicyFileError, format_ref, parse_ref, policy_schema_text
from service.registry import (
    LOCK_FILE,
    load_registry,
    policy_files,
    read_lock,
    read_policy_file,
    sha256_of,
)
from service.settings import Settings


def main(argv: list[str] | None = None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    if not hasattr(args, "run"):
        parser.print_help()
        return 2
    try:
        code: int = args.run(args)
        return code
    except (PolicyFileError, KeysError, ValueError, OSError) as exc:
        print(f"keepset: {exc}", file=sys.stderr)
        return 1


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="keepset", description=__doc__.splitlines()[0])
    verbs = parser.add_subparsers(title="commands")

    serve = verbs.add_parser("serve", help="run the HTTP service")
    for name in Settings.model_fields:
        flag = "--" + name.replace("_", "-")
        serve.add_argument(flag, dest=name, default=None, help=f"KEEPSET_{name.upper()}")
    serve.set_defaults(run=_serve)

    policy = verbs.add_parser("policy", help="work with a policy registry").add_subparsers()
    check = policy.add_parser("check", help="check every file of a registry")
    check.add_argument("dir", nargs="?", type=Path, default=None)
    check.set_defaults(run=_check)
    publish = policy.add_parser("publish", help="publish the next version of a policy")
    publish.add_argument("dir", type=Path)
    publish.add_argument("name")
    publish.set_defaults(run=_publish)
    diff = policy.add_parser("diff", help="compare two versions field by field")
    diff.add_argument("a")
    diff.add_argument("b")
    diff.add_argument("--policies", type=Path, default=None)
    diff.set_defaults(run=_diff)
    schema = policy.add_parser("schema", help="rewrite policy.schema.json from the model")
    schema.add_argument("dir", nargs="?", type=Path, default=None)
    schema.set_defaults(run=_schema)
    _preview_parser(policy)

    keys = verbs.add_parser("keys", help="manage API keys").add_subparsers()
    add = keys.add_parser("add", help="make a key, store its hash, print it once")
    add.add_argument("name")
    add.add_argument("--keys", type=Path, default=None)
    add.add_argument("--admin", action="store_true", help="an admin key instead of a client key")
    add.add_argument(
        "--rotate",
        action="store_true",
        help="replace an existing key; the old one keeps working for --overlap-hours",
    )
    add.add_argument(
        "--overlap-hours",
        type=float,
        default=24.0,
        help="with --rotate: how long the old key stays accepted (default 24; 0 ends it now)",
    )
    add.add_argument(
        "--expires-days", type=float, default=None, help="the new key stops working after this"
    )
    add.set_defaults(run=_keys_add)

    experiment = verbs.add_parser("experiment", help="A/B experiments").add_subparsers()
    report = experiment.add_parser("report", help="outcomes per arm, tests against the control")
    report.add_argument("--url", default="http://127.0.0.1:8411")
    report.add_argument("--key", default=None, help="an admin key (default: KEEPSET_ADMIN_KEY)")
    report.add_argument("--client", default=None, help="only this client")
    report.add_argument("--json", action="store_true", help="the report as JSON")
    report.set_defaults(run=_experiment_report)
    return parser


def _registry_dir(given: Path | None) -> Path:
    return given if given is not None else Settings().policies


def _check(args: argparse.Namespace) -> int:
    root = _registry_dir(args.dir)
    snapshot = load_registry(root)
    for line in snapshot.problem_lines():
        print(line)
    if snapshot.valid:
        print(
            f"ok: {len(snapshot.loaded)} policy versions, {len(snapshot.routes)} clients in {root}"
        )
        return 0
    print(f"{len(snapshot.refused)} problem(s) in {root}", file=sys.stderr)
    return 1


def _publish(args: argparse.Namespace) -> int:
    root: Path = args.dir
    lock, problems = read_lock(root)
    if problems:
        raise ValueError("; ".join(p.line() for p in problems))
    versions = sorted(
        int(p.stem) for p in policy_files(root) if p.parent.name == args.name and p.stem.isdigit()
    )
    published = sorted(v for (n, v) in lock if n == args.name)
    for v in published:
        path = root / args.name / f"{v}.yaml"
        if path.exists() and sha256_of(path.read_bytes()) != lock[(args.name, v)]:
            raise ValueError(
                f"{path}: published version was edited; restore it and add a new version"
            )
    fresh = [v for v in versions if v not in published]
    if not fresh:
        raise ValueError(f"{args.name}: no unpublished version under {root / args.name}")
    nxt = (published[-1] if published else 0) + 1
    if fresh[0] != nxt:
        raise ValueError(
            f"{args.name}: publish versions in order; the next is {nxt}, found {fresh}"
        )
    path = root / args.name / f"{nxt}.yaml"
    read_policy_file(root, path)  # refuse to publish an invalid file
    with (root / LOCK_FILE).open("a", encoding="utf-8") as lock_file:
        lock_file.write(f"{args.name} {nxt} {sha256_of(path.read_bytes())}\n")
    print(f"published {format_ref(args.name, nxt)}")
    return 0


def _diff(args: argparse.Namespace) -> int:
    root = _registry_dir(args.policies)
    (na, va), (nb, vb) = parse_ref(args.a), parse_ref(args.b)
    a = read_policy_file(root, root / na / f"{va}.yaml").model_dump(mode="json")
    b = read_policy_file(root, root / nb / f"{vb}.yaml").model_dump(mode="json")
    lines = _diff_lines(a, b, "")
    print(f"--- {args.a}\n+++ {args.b}")
    print("\n".join(lines) if lines else "(no differences)")
    return 0


def _diff_lines(a: Any, b: Any, where: str) -> list[str]:
    if isinstance(a, dict) and isinstance(b, dict):
        out = []
        for key in sorted(set(a) | set(b), key=str):
            sub = f"{where}.{key}" if where else str(key)
            if key not in a:
                out.append(f"+ {sub}: {json.dumps(b[key])}")
            elif key not in b:
                out.append(f"- {sub}: {json.dumps(a[key])}")
            else:
                out += _diff_lines(a[key], b[key], sub)
        return out
    if isinstance(a, list) and isinstance(b, list) and a != b:
        out = []
        for i in range(max(len(a), len(b))):
            sub = f"{where}[{i}]"
            if i >= len(a):
                out.append(f"+ {sub}: {json.dumps(b[i])}")
            elif i >= len(b):
                out.append(f"- {sub}: {json.dumps(a[i])}")
            elif a[i] != b[i]:
                out.append(f"~ {sub}: {json.dumps(a[i])} -> {json.dumps(b[i])}")
        return out
    if a != b:
        return [f"~ {where}: {json.dumps(a)} -> {json.dumps(b)}"]
    return []


def _schema(args: argparse.Namespace) -> int:
    path = _registry_dir(args.dir) / "policy.schema.json"
    path.write_text(policy_schema_text(), encoding="utf-8")
    print(f"wrote {path}")
    return 0


def _preview_parser(policy: Any) -> None:
    preview = policy.add_parser(
        "preview",
        help="replay policy versions over captured rows or prompts and compare them",
        description="Replay policy versions over a capture (--capture) or continue a prompt "
        "file with the bundled model (--prompts); print a table of their statistics with "
        "bootstrap intervals, and the differences from the first version.",
    )
    preview.add_argument("refs", nargs="+", metavar="NAME@V", help="first one is the baseline")
    source = preview.add_mutually_exclusive_group(required=True)
    source.add_argument(
        "--capture", type=Path, nargs="+", metavar="PATH", help="shard files or folders"
    )
    source.add_argument("--prompts", type=Path, metavar="FILE", help="one prompt per line")
    preview.add_argument("--policies", type=Path, default=None)
    preview.add_argument("--seed", type=int, default=0, help="bootstrap and prompt seeds")
    preview.add_argument(
        "--json", default=None, metavar="FILE", help="write JSON here (- for stdout)"
    )
    preview.add_argument("--html", type=Path, default=None, metavar="FILE")
    preview.add_argument("--sweep", default=None, metavar="FIELD=START:STOP:STEP")
    preview.add_argument("--budget", type=int, default=None, help="tokens per prompt")
    preview.add_argument("--rows", type=int, default=None, metavar="LIMIT")
    preview.add_argument("--resamples", type=int, default=1000)
    preview.add_argument("--confidence", type=float, default=0.95)
    preview.add_argument("--progress", action="store_true", help="progress bar even off a TTY")
    preview.set_defaults(run=_preview)


def _preview(args: argparse.Namespace) -> int:
    from service.preview import command as preview_command

    return preview_command.run(args, _registry_dir(args.policies))


def _keys_add(args: argparse.Namespace) -> int:
    path = args.keys if args.keys is not None else Settings().keys
    key = add_key(
        path,
        args.name,
        "admin" if args.admin else "client",
        rotate=args.rotate,
        overlap=dt.timedelta(hours=args.overlap_hours),
        expires_in=None if args.expires_days is None else dt.timedelta(days=args.expires_days),
    )
    print(key)
    print(
        f"stored the hash for {args.name} in {path}; this key is not shown again", file=sys.stderr
    )
    return 0


def _experiment_report(args: argparse.Namespace) -> int:
    import httpx

    from service.report import render_report

    key = args.key or os.environ.get("KEEPSET_ADMIN_KEY")
    if not key:
        raise ValueError("give an admin key with --key or KEEPSET_ADMIN_KEY")
    try:
        response = httpx.get(
            f"{args.url.rstrip('/')}/v1/routes",
            headers={"Authorization": f"Bearer {key}"},
            timeout=30.0,
        )
    except httpx.HTTPError as exc:
        raise ValueError(f"cannot reach {args.url}: {exc}") from None
    if response.status_code != 200:
        raise ValueError(f"{args.url}/v1/routes answered {response.status_code}: {response.text}")
    clients: dict[str, Any] = response.json()["clients"]
    if args.client is not None:
        if args.client not in clients:
            raise ValueError(f"no client {args.client!r}; known: {', '.join(sorted(clients))}")
        clients = {args.client: clients[args.client]}
    if args.json:
        print(json.dumps({"clients": clients}, indent=2))
    else:
        print(render_report(clients))
    return 0


def _serve(args: argparse.Namespace) -> int:
    import uvicorn

    from service import listen

    for name in Settings.model_fields:
        value = getattr(args, name)
        if value is not None:
            os.environ[f"KEEPSET_{name.upper()}"] = str(value)
    settings = Settings()  # validates the flags and variables before anything starts
    if settings.request_secret is None:
        # Every worker must check the ids any worker minted: one secret per start, shared
        # through the environment the workers inherit.
        os.environ["KEEPSET_REQUEST_SECRET"] = secrets.token_hex(32)
    snapshot = load_registry(settings.policies)
    for line in snapshot.problem_lines():
        print(f"keepset: registry: {line}", file=sys.stderr)
    # Every worker writes its metrics to one fresh folder; /metrics sums over them.
    metrics_dir = tempfile.mkdtemp(prefix="keepset-metrics-")
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = metrics_dir
    try:
        config = uvicorn.Config(
            "service.app:create_app",
            factory=True,
            host=settings.host,
            port=settings.port,
            workers=settings.workers,
            loop="uvloop",
            http="httptools",
            log_level=settings.log_level,
            timeout_graceful_shutdown=math.ceil(settings.shutdown_seconds),
        )
        return listen.run(config, settings.uds)
    finally:
        shutil.rmtree(metrics_dir, ignore_errors=True)


if __name__ == "__main__":
    raise SystemExit(main())
