"""Policy preview: replay policy versions over captured rows or over prompts with the bundled
model, and gather what each did into one :class:`PreviewReport` (JSON-ready).

Capture mode replays every version on every captured row with the row's own seed and stream
(``pick(chain, rows, seed, histories, first_stream=stream)``), so the version that served a row
reproduces the served token. Rows of one request share a seed and have consecutive streams; such
runs go to ``pick`` as one batch. Prompt mode continues each prompt once per version with
``PromptRun``, with a seed derived from the preview's seed and the prompt's index, so every
version sees the same prompts under the same seeds. The statistics and their bootstrap
intervals are :mod:`service.preview.stats`; the terminal table and HTML report render a report.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from service.metrics import fibonacci_buckets
from service.model import Model, PromptError
from service.policy import Policy, first_stage, format_ref, parse_ref
from service.preview.progress import Progress
from service.preview.stats import (
    Bootstrapped,
    Continuations,
    Indices,
    Rows,
    continuation_statistic,
    distinct,
    entropy_of,
    kept_histogram,
    paired_bootstrap,
    repetition,
    row_statistics,
    unit_rows,
)
from service.prompting import PromptRun
from service.registry import RegistrySnapshot
from service.sampling import Chain, ChainError, InputError, Kernel, final_distribution, pick
from service.shards import Shard

# Rows per final_distribution call: its answer is float64 [rows, V], so this bounds memory.
_CHUNK = 64
_ENTROPY_POINTS = 41
_MAX_SWEEP_POINTS = 101
Mode = Literal["capture", "prompts"]


class PreviewError(ValueError):
    """A preview that cannot run as asked: unknown version, no rows, bad sweep, bad input."""


# --- versions and sweeps ----------------------------------------------------------------------


def resolve_versions(snapshot: RegistrySnapshot, refs: Sequence[str]) -> list[Policy]:
    """The policy of each ``name@version``, or PreviewError naming what is known instead."""
    if not refs:
        raise PreviewError("name at least one policy version, e.g. prompt-book@4")
    out = []
    for text in refs:
        name, version = parse_ref(text)
        policy = snapshot.find(name, version)
        if policy is None:
            known = [format_ref(p.name, p.version) for p in snapshot.versions_of(name)]
            refused = [r.line() for r in snapshot.refused if f"{name}/{version}." in r.file]
            hint = f"; refused: {refused[0]}" if refused else ""
            raise PreviewError(
                f"unknown policy version {text} in {snapshot.root} "
                f"(known versions of {name}: {', '.join(known) or 'none'}){hint}"
            )
        out.append(policy)
    if len({p.ref for p in out}) != len(out):
        raise PreviewError("each policy version may be named once")
    return out


@dataclass(frozen=True)
class Sweep:
    """One stage parameter and the values it takes, on the first version's chain."""

    field: str
    values: tuple[float, ...]


def parse_sweep(text: str) -> Sweep:
    """``FIELD=START:STOP:STEP``, STOP included (within rounding), at most 101 values."""
    name, sep, spec = text.partition("=")
    parts = spec.split(":")
    if not sep or len(parts) != 3:
        raise PreviewError(
            f"--sweep expects FIELD=START:STOP:STEP like top_p=0.5:1.0:0.05, got {text!r}"
        )
    try:
        start, stop, step = (float(p) for p in parts)
    except ValueError:
        raise PreviewError(f"--sweep: START, STOP and STEP must be numbers, got {spec!r}") from None
    if not all(math.isfinite(x) for x in (start, stop, step)) or step <= 0 or stop < start:
        raise PreviewError(f"--sweep: need STEP > 0 and STOP >= START, got {spec!r}")
    count = math.floor((stop - start) / step + 1e-9) + 1
    if count > _MAX_SWEEP_POINTS:
        raise PreviewError(f"--sweep: {count} values; at most {_MAX_SWEEP_POINTS}")
    return Sweep(name.strip(), tuple(round(start + i * step, 10) for i in range(count)))


def sweep_chains(chain: Chain, sweep: Sweep) -> list[Chain]:
    """``chain`` with the first stage of the swept method set to each value."""
    index = first_stage(chain, sweep.field)
    if index is None:
        methods = ", ".join(s.method for s in chain.stages)
        raise PreviewError(
            f"--sweep {sweep.field}: the first version's chain has no such stage ({methods})"
        )
    out = []
    for value in sweep.values:
        param: float | int = value
        if sweep.field == "top_k":
            if not float(value).is_integer():
                raise PreviewError(f"--sweep top_k takes whole numbers, got {value:g}")
            param = int(value)
        try:
            out.append(chain.with_param(index, param))
        except ChainError as exc:
            raise PreviewError(f"--sweep {sweep.field}={value:g}: {exc}") from None
    return out


# --- capture replay ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Replayed:
    """One version replayed on the captured rows: per-row results and the tokens drawn."""

    rows: Rows
    tokens: npt.NDArray[np.int64]


def request_runs(seed: npt.NDArray[np.uint64], stream: npt.NDArray[np.int64]) -> list[Indices]:
    """Rows grouped into runs one ``pick`` call can replay: the same seed, consecutive streams
    (the rows of one request, or the steps of one continuation), each run in stream order."""
    if seed.size == 0:
        return []
    order = np.lexsort((stream, seed)).astype(np.intp)
    s, t = seed[order], stream[order]
    cut = np.flatnonzero((s[1:] != s[:-1]) | (t[1:] != t[:-1] + 1)) + 1
    return list(np.split(order, cut))


def replay_shard(
    chain: Chain,
    shard: Shard,
    count: int,
    *,
    kernel: Kernel | None = None,
    progress: Callable[[int], None] | None = None,
) -> Replayed:
    """Replay ``chain`` on the first ``count`` rows of ``shard``."""
    histories = shard.histories()[:count]
    logits = shard.logits[:count].astype(np.float32)  # once, not per request
    kept = np.empty(count, np.int64)
    tokens = np.empty(count, np.int64)
    entropy = np.empty(count)
    mass = np.empty(count)
    fallback = np.full(count, "", dtype="<U16")
    done = 0
    for run in request_runs(shard.seed[:count], shard.stream[:count]):
        out = pick(
            chain,
            logits[run],
            int(shard.seed[run[0]]),
            [histories[i] for i in run],
            first_stream=int(shard.stream[run[0]]),
            kernel=kernel,
        )
        kept[run], tokens[run], entropy[run], mass[run] = (
            out.kept,
            out.tokens,
            out.entropy,
            out.kept_mass,
        )
        fallback[run] = [f or "" for f in out.fallback]
        done += run.size
        if progress is not None:
            progress(done)
    policy_entropy = policy_entropies(chain, logits, histories, kernel)
    return Replayed(Rows(kept, entropy, policy_entropy, mass, fallback), tokens)


def policy_entropies(
    chain: Chain,
    logits: npt.NDArray[np.floating[Any]],
    histories: Sequence[Sequence[int]],
    kernel: Kernel | None,
) -> npt.NDArray[np.float64]:
    """Entropy of the distribution each row is drawn from under ``chain``."""
    out = np.empty(logits.shape[0])
    for lo in range(0, logits.shape[0], _CHUNK):
        hi = min(lo + _CHUNK, logits.shape[0])
        probs = final_distribution(chain, logits[lo:hi], histories[lo:hi], kernel=kernel)
        out[lo:hi] = entropy_of(probs)
    return out


def _concat(parts: Sequence[Rows]) -> Rows:
    return Rows(
        np.concatenate([p.kept for p in parts]),
        np.concatenate([p.entropy_model for p in parts]),
        np.concatenate([p.entropy_policy for p in parts]),
        np.concatenate([p.kept_mass for p in parts]),
        np.concatenate([p.fallback for p in parts]),
    )


# --- the report -------------------------------------------------------------------------------


@dataclass
class SweepResult:
    field: str
    values: list[float]
    kept_median: list[float]
    kept_mean: list[float]
    entropy_policy: list[float]
    distinct: dict[str, list[float]] = dataclasses.field(default_factory=dict)  # prompt mode only


@dataclass
class PreviewReport:
    """Everything a preview measured; :meth:`as_json` is the ``--json`` document."""

    mode: Mode
    versions: list[str]
    seed: int
    resamples: int
    confidence: float
    sources: list[str]
    skipped: list[str]
    rows: int
    units: int
    statistics: list[dict[str, Any]]
    differences: list[dict[str, Any]]
    kept_edges: list[int]
    kept_histograms: list[list[int]]
    entropy_grid: list[float]
    entropy_cdf: dict[str, list[float]]
    served: list[dict[str, Any]] = dataclasses.field(default_factory=list)
    sweep: SweepResult | None = None

    def as_json(self) -> dict[str, Any]:
        return {
            "format": "keepset-preview/1",
            "mode": self.mode,
            "versions": self.versions,
            "baseline": self.versions[0],
            "seed": self.seed,
            "resamples": self.resamples,
            "confidence": self.confidence,
            "sources": self.sources,
            "skipped": self.skipped,
            "rows": self.rows,
            "units": self.units,
            "unit": "row" if self.mode == "capture" else "continuation",
            "statistics": dict(zip(self.versions, self.statistics, strict=True)),
            "differences": dict(zip(self.versions[1:], self.differences, strict=True)),
            "served": dict(zip(self.versions, self.served, strict=True)) if self.served else {},
            "kept_histogram": {
                "edges": self.kept_edges,
                "counts": dict(zip(self.versions, self.kept_histograms, strict=True)),
            },
            "entropy_cdf": {"grid": self.entropy_grid, "curves": self.entropy_cdf},
            "sweep": None if self.sweep is None else _rounded(self.sweep.__dict__),
        }


def _rounded(value: Any) -> Any:
    if isinstance(value, float):
        return None if not math.isfinite(value) else float(f"{value:.6g}")
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    return value


def _intervals(b: Bootstrapped) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    own = [{k: i.as_dict() for k, i in stats.items()} for stats in b.own]
    diff = [{k: i.as_dict() for k, i in stats.items()} for stats in b.difference]
    return own, diff


def _entropy_cdf(
    versions: Sequence[str], rows: Sequence[Rows]
) -> tuple[list[float], dict[str, list[float]]]:
    """Share of rows with entropy <= x on a common grid: the model's, then each version's."""
    # A temperature above 1 can leave a version flatter than the raw model: cover both.
    top = max(
        [float(r.entropy_model.max(initial=0.0)) for r in rows]
        + [float(r.entropy_policy.max(initial=0.0)) for r in rows]
        + [1e-6]
    )
    grid = np.linspace(0.0, top, _ENTROPY_POINTS)
    curves = {"model": _cdf(rows[0].entropy_model, grid)}
    for name, r in zip(versions, rows, strict=True):
        curves[name] = _cdf(r.entropy_policy, grid)
    return [float(f"{x:.6g}") for x in grid], curves


def _cdf(values: npt.NDArray[np.float64], grid: npt.NDArray[np.float64]) -> list[float]:
    ordered = np.sort(values)
    at = np.searchsorted(ordered, grid, side="right") / max(ordered.size, 1)
    return [float(f"{x:.6g}") for x in at]


def _edges(rows: Sequence[Rows]) -> list[int]:
    largest = max(int(r.kept.max(initial=1)) for r in rows)
    return [int(e) for e in fibonacci_buckets(max(largest, 2))]


def preview_capture(
    shards: Sequence[Shard],
    refs: Sequence[str],
    snapshot: RegistrySnapshot,
    seed: int = 0,
    *,
    resamples: int = 1000,
    confidence: float = 0.95,
    sweep: Sweep | None = None,
    rows_limit: int | None = None,
    sources: Sequence[str] = (),
    skipped: Sequence[str] = (),
    kernel: Kernel | None = None,
    progress: Progress | None = None,
) -> PreviewReport:
    """Replay each version on the captured rows (the first ``rows_limit``, in shard order) and
    report their statistics, the paired differences from the first version, and the sweep."""
    policies = resolve_versions(snapshot, refs)
    _check_bootstrap(resamples, confidence)
    counts = _row_counts(shards, rows_limit)
    total = sum(counts)
    if total == 0:
        raise PreviewError("the capture holds no rows")
    bar = progress if progress is not None else Progress(False)
    chains = [snapshot.chain((p.name, p.version)) for p in policies]
    if sweep is not None:
        sweep_chains(chains[0], sweep)  # a bad sweep fails before the long part
    replayed = [
        _replay_all(c, p.ref, shards, counts, kernel, bar)
        for c, p in zip(chains, policies, strict=True)
    ]
    # The raw-model entropy is the same for every version; take one replay's so that the
    # differences in it are exactly zero, not last-bit noise between sampling paths.
    shared = replayed[0].rows.entropy_model
    rows = [
        Rows(r.rows.kept, shared, r.rows.entropy_policy, r.rows.kept_mass, r.rows.fallback)
        for r in replayed
    ]
    statistics = [_row_statistic(r) for r in rows]
    own, diff = _bootstrapped(statistics, total, seed, resamples, confidence, bar)
    edges = _edges(rows)
    grid, cdf = _entropy_cdf([p.ref for p in policies], rows)
    served = [_served(p, shards, counts, r.tokens) for p, r in zip(policies, replayed, strict=True)]
    swept = None
    if sweep is not None:
        swept = _sweep_capture(chains[0], sweep, shards, counts, kernel, bar)
    return PreviewReport(
        mode="capture",
        versions=[p.ref for p in policies],
        seed=seed,
        resamples=resamples,
        confidence=confidence,
        sources=list(sources),
        skipped=list(skipped),
        rows=total,
        units=total,
        statistics=own,
        differences=diff,
        kept_edges=edges,
        kept_histograms=[kept_histogram(r.kept, edges) for r in rows],
        entropy_grid=grid,
        entropy_cdf=cdf,
        served=served,
        sweep=swept,
    )


def _bootstrapped(
    statistics: list[Callable[[Indices], dict[str, float]]],
    units: int,
    seed: int,
    resamples: int,
    confidence: float,
    bar: Progress,
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Each version's intervals and its paired differences from the first, resampling
    ``units`` with the preview's seed."""
    bar.start("bootstrap", resamples)
    boot = paired_bootstrap(
        statistics,
        units,
        resamples=resamples,
        confidence=confidence,
        rng=np.random.default_rng(seed),
        progress=bar.update,
    )
    bar.finish()
    return _intervals(boot)


def _check_bootstrap(resamples: int, confidence: float) -> None:
    if resamples < 1:
        raise PreviewError(f"--resamples must be at least 1, got {resamples}")
    if not 0.0 < confidence < 1.0:
        raise PreviewError(f"--confidence must lie between 0 and 1, got {confidence:g}")


def _row_counts(shards: Sequence[Shard], limit: int | None) -> list[int]:
    if limit is not None and limit < 1:
        raise PreviewError(f"--rows must be at least 1, got {limit}")
    left = math.inf if limit is None else limit
    counts = []
    for s in shards:
        n = int(min(s.rows, left))
        counts.append(n)
        left -= n
    return counts


def _replay_all(
    chain: Chain,
    label: str,
    shards: Sequence[Shard],
    counts: Sequence[int],
    kernel: Kernel | None,
    bar: Progress,
) -> Replayed:
    bar.start(f"replay {label}", sum(counts))
    parts: list[Replayed] = []
    before = 0
    for shard, n in zip(shards, counts, strict=True):
        if n == 0:
            continue
        try:
            parts.append(
                replay_shard(chain, shard, n, kernel=kernel, progress=_shifted(bar, before))
            )
        except InputError as exc:
            raise PreviewError(f"{label} cannot replay these rows: {exc}") from None
        before += n
    bar.finish()
    return Replayed(_concat([p.rows for p in parts]), np.concatenate([p.tokens for p in parts]))


def _shifted(bar: Progress, offset: int) -> Callable[[int], None]:
    return lambda done: bar.update(offset + done)


def _row_statistic(rows: Rows) -> Callable[[Indices], dict[str, float]]:
    return lambda idx: row_statistics(rows.take(idx))


def _served(
    policy: Policy, shards: Sequence[Shard], counts: Sequence[int], tokens: npt.NDArray[np.int64]
) -> dict[str, Any]:
    """How many captured rows this version served, and on what share of them the replay drew
    the served token (1.0 unless the row was adjusted or float16 storage changed its logits)."""
    mine = np.concatenate(
        [
            (s.policy[:n] == policy.name) & (s.version[:n] == policy.version)
            for s, n in zip(shards, counts, strict=True)
        ]
    )
    served = np.concatenate([s.token[:n] for s, n in zip(shards, counts, strict=True)])
    k = int(mine.sum())
    same = float(np.mean(tokens[mine] == served[mine])) if k else None
    return {"rows": k, "same_token": same}


def _sweep_capture(
    chain: Chain,
    sweep: Sweep,
    shards: Sequence[Shard],
    counts: Sequence[int],
    kernel: Kernel | None,
    bar: Progress,
) -> SweepResult:
    out = SweepResult(sweep.field, list(sweep.values), [], [], [])
    for value, swept in zip(sweep.values, sweep_chains(chain, sweep), strict=True):
        rows = _replay_all(
            swept, f"sweep {sweep.field}={value:g}", shards, counts, kernel, bar
        ).rows
        out.kept_median.append(float(np.median(rows.kept)))
        out.kept_mean.append(float(np.mean(rows.kept)))
        out.entropy_policy.append(float(np.mean(rows.entropy_policy)))
    return out


# --- prompt mode ------------------------------------------------------------------------------


def prompt_seed(seed: int, index: int) -> int:
    """The seed of prompt ``index`` in a preview seeded ``seed``: a hash, so neighbouring
    prompts get unrelated streams; below 2**53 like every seed the service hands out."""
    digest = hashlib.sha256(f"keepset-preview:{seed}:{index}".encode()).digest()
    return int.from_bytes(digest[:8], "big") >> 11


@dataclass(frozen=True)
class Generated:
    rows: Rows
    continuations: Continuations
    lengths: list[int]  # rows (steps) per continuation


def read_prompts(text: str) -> list[str]:
    """One prompt per line; blank lines are skipped. A literal ``\\n`` in a line is a newline."""
    prompts = [line.replace("\\n", "\n") for line in text.splitlines() if line.strip()]
    if not prompts:
        raise PreviewError("the prompt file holds no prompt (one per line)")
    return prompts


def generate(
    model: Model,
    chain: Chain,
    policy: Policy,
    prompts: Sequence[str],
    seed: int,
    budget: int | None,
    kernel: Kernel | None,
    bar: Progress,
    label: str,
) -> Generated:
    """Continue every prompt under ``chain``; the steps are the rows."""
    parts: list[Rows] = []
    tokens: list[list[int]] = []
    finish: list[str] = []
    bar.start(label, len(prompts))
    end_id = model.info.end_id
    for i, prompt in enumerate(prompts):
        try:
            run = PromptRun(
                model,
                chain,
                prompt,
                budget=policy.budget if budget is None else budget,
                seed=prompt_seed(seed, i),
                stop=policy.stop,
                keep_logits=True,
                kernel=kernel,
            )
        except PromptError as exc:
            raise PreviewError(f"prompt {i + 1}: {exc}") from None
        records = list(run)
        logits = run.logits or []
        kept = np.array([r.kept for r in records], np.int64)
        entropy = np.array([r.entropy for r in records], np.float64)
        mass = np.array([r.kept_mass for r in records], np.float64)
        fallback = np.array([r.fallback or "" for r in records], dtype="<U16")
        if records:
            policy_entropy = policy_entropies(chain, np.stack(logits), run.histories, kernel)
        else:
            policy_entropy = np.zeros(0)
        parts.append(Rows(kept, entropy, policy_entropy, mass, fallback))
        ids = run.tokens
        if run.finish == "end" and ids and ids[-1] == end_id:
            ids = ids[:-1]  # the end marker is not text
        tokens.append(ids)
        finish.append(run.finish or "budget")
        bar.update(i + 1)
    bar.finish()
    return Generated(_concat(parts), Continuations(tokens, finish), [p.size for p in parts])


def preview_prompts(
    model: Model,
    prompts: Sequence[str],
    refs: Sequence[str],
    snapshot: RegistrySnapshot,
    seed: int = 0,
    *,
    budget: int | None = None,
    resamples: int = 1000,
    confidence: float = 0.95,
    sweep: Sweep | None = None,
    sources: Sequence[str] = (),
    kernel: Kernel | None = None,
    progress: Progress | None = None,
) -> PreviewReport:
    """Continue every prompt under each version and report per-row and per-continuation
    statistics; resampling is by continuation, paired across versions (same prompts, seeds)."""
    policies = resolve_versions(snapshot, refs)
    _check_bootstrap(resamples, confidence)
    if not prompts:
        raise PreviewError("no prompts to continue")
    if budget is not None and budget < 1:
        raise PreviewError(f"--budget must be at least 1, got {budget}")
    bar = progress if progress is not None else Progress(False)
    chains = [snapshot.chain((p.name, p.version)) for p in policies]
    if sweep is not None:
        sweep_chains(chains[0], sweep)  # a bad sweep fails before the long part
    runs = [
        generate(model, c, p, prompts, seed, budget, kernel, bar, f"continue {p.ref}")
        for c, p in zip(chains, policies, strict=True)
    ]
    statistics = [_prompt_statistic(g) for g in runs]
    own, diff = _bootstrapped(statistics, len(prompts), seed, resamples, confidence, bar)
    rows = [g.rows for g in runs]
    edges = _edges(rows)
    grid, cdf = _entropy_cdf([p.ref for p in policies], rows)
    swept = None
    if sweep is not None:
        swept = _sweep_prompts(
            model, chains[0], policies[0], sweep, prompts, seed, budget, kernel, bar
        )
    return PreviewReport(
        mode="prompts",
        versions=[p.ref for p in policies],
        seed=seed,
        resamples=resamples,
        confidence=confidence,
        sources=list(sources),
        skipped=[],
        rows=sum(r.size for r in rows),
        units=len(prompts),
        statistics=own,
        differences=diff,
        kept_edges=edges,
        kept_histograms=[kept_histogram(r.kept, edges) for r in rows],
        entropy_grid=grid,
        entropy_cdf=cdf,
        sweep=swept,
    )


def _prompt_statistic(g: Generated) -> Callable[[Indices], dict[str, float]]:
    rows_of = unit_rows(g.lengths)
    continuations = continuation_statistic(g.continuations)

    def statistic(idx: Indices) -> dict[str, float]:
        return {
            **row_statistics(g.rows.take(rows_of(idx))),
            **continuations(idx),
        }

    return statistic


def _sweep_prompts(
    model: Model,
    chain: Chain,
    policy: Policy,
    sweep: Sweep,
    prompts: Sequence[str],
    seed: int,
    budget: int | None,
    kernel: Kernel | None,
    bar: Progress,
) -> SweepResult:
    out = SweepResult(
        sweep.field,
        list(sweep.values),
        [],
        [],
        [],
        {"distinct_1": [], "distinct_2": [], "distinct_3": [], "repetition_2": []},
    )
    for value, swept in zip(sweep.values, sweep_chains(chain, sweep), strict=True):
        g = generate(
            model,
            swept,
            policy,
            prompts,
            seed,
            budget,
            kernel,
            bar,
            f"sweep {sweep.field}={value:g}",
        )
        out.kept_median.append(float(np.median(g.rows.kept)) if g.rows.size else math.nan)
        out.kept_mean.append(float(np.mean(g.rows.kept)) if g.rows.size else math.nan)
        out.entropy_policy.append(
            float(np.mean(g.rows.entropy_policy)) if g.rows.size else math.nan
        )
        for n in (1, 2, 3):
            out.distinct[f"distinct_{n}"].append(distinct(g.continuations.tokens, n))
        reps = [r for t in g.continuations.tokens if (r := repetition(t, 2)) is not None]
        out.distinct["repetition_2"].append(float(np.mean(reps)) if reps else math.nan)
    return out
