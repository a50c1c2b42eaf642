"""``keepset policy preview``: read the capture or the prompt file, run the preview, write the
table, the JSON and the HTML report.

Unreadable shard files (not a capture shard of this format, truncated, wrong columns) are skipped
with a warning on stderr and listed under ``skipped`` in the report: one damaged file should not
hide the rest of a capture. A capture with no readable rows at all is an error.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from service.model import Model, ModelError
from service.preview.page import render
from service.preview.progress import Progress
from service.preview.replay import (
    PreviewError,
    PreviewReport,
    parse_sweep,
    preview_capture,
    preview_prompts,
    read_prompts,
)
from service.preview.table import table
from service.registry import load_registry
from service.settings import Settings
from service.shards import SUFFIX, Shard, ShardError, read_shard, shard_files


def collect_shards(paths: list[Path]) -> tuple[list[Shard], list[str], list[str]]:
    """(readable shards, their files, skipped files with reasons) under ``paths`` (files or
    folders, in the order given; a folder's shards oldest name first)."""
    shards: list[Shard] = []
    sources: list[str] = []
    skipped: list[str] = []
    for path in paths:
        if path.is_dir():
            files = list(shard_files(path))
        elif path.is_file():
            files = [path]
        else:
            raise PreviewError(f"{path}: no such capture file or folder")
        for file in files:
            try:
                shards.append(read_shard(file))
                sources.append(str(file))
            except ShardError as exc:
                print(f"keepset: warning: skipped {exc}", file=sys.stderr)
                skipped.append(str(exc))
    if not shards:
        where = ", ".join(str(p) for p in paths)
        raise PreviewError(f"no readable capture shard (*{SUFFIX}) under {where}")
    return shards, sources, skipped


def run(args: argparse.Namespace, root: Path) -> int:
    snapshot = load_registry(root)
    sweep = parse_sweep(args.sweep) if args.sweep else None
    progress = Progress(args.progress or sys.stderr.isatty())
    report: PreviewReport
    if args.capture is not None:
        if args.budget is not None:
            raise PreviewError("--budget applies to --prompts only")
        shards, sources, skipped = collect_shards(args.capture)
        report = preview_capture(
            shards,
            args.refs,
            snapshot,
            args.seed,
            resamples=args.resamples,
            confidence=args.confidence,
            sweep=sweep,
            rows_limit=args.rows,
            sources=sources,
            skipped=skipped,
            progress=progress,
        )
    else:
        if args.rows is not None:
            raise PreviewError("--rows applies to --capture only")
        report = preview_prompts(
            _model(),
            _read_prompts(args.prompts),
            args.refs,
            snapshot,
            args.seed,
            budget=args.budget,
            resamples=args.resamples,
            confidence=args.confidence,
            sweep=sweep,
            sources=[str(args.prompts)],
            progress=progress,
        )
    if args.json == "-":
        sys.stdout.write(dump_json(report))
    else:
        print(table(report))
        if args.json is not None:
            Path(args.json).write_text(dump_json(report), encoding="utf-8")
            print(f"wrote {args.json}", file=sys.stderr)
    if args.html is not None:
        args.html.write_text(render(report), encoding="utf-8")
        print(f"wrote {args.html}", file=sys.stderr)
    return 0


def _read_prompts(path: Path) -> list[str]:
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise PreviewError(f"{path}: cannot be read ({exc})") from None
    return read_prompts(text)


def _model() -> Model:
    try:
        return Model(Settings().model, threads=1)
    except ModelError as exc:
        raise PreviewError(str(exc)) from None


def dump_json(report: PreviewReport) -> str:
    """The report as JSON text: keys in a fixed order, no NaN, so the same run gives the same
    bytes."""
    return json.dumps(report.as_json(), indent=2, allow_nan=False) + "\n"
