"""Policy preview: statistics against hand-worked examples and published definitions, the
percentile bootstrap's coverage, exact replay of served rows, determinism, the CLI and prompt
mode on the bundled model."""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
from capture_rows import Request, served_shard, write_capture
from scipy import stats

from service.cli import main
from service.model import BUNDLED, Model
from service.preview.command import dump_json
from service.preview.page import render
from service.preview.progress import Progress, bar_line
from service.preview.replay import (
    PreviewError,
    generate,
    parse_sweep,
    preview_capture,
    preview_prompts,
    prompt_seed,
    read_prompts,
    replay_shard,
    request_runs,
)
from service.preview.stats import (
    Continuations,
    Rows,
    continuation_statistic,
    continuation_statistics,
    distinct,
    distinct_shares,
    paired_bootstrap,
    percentile_interval,
    repetition,
    row_statistics,
)
from service.prompting import PromptRun
from service.registry import load_registry
from service.shards import Shard, read_shard, write_shard

ROOT = Path(__file__).resolve().parents[1]
ARMS = [(("prompt-book", 3), "control"), (("prompt-book", 4), "candidate")]

# --- hand-worked examples ---------------------------------------------------------------------

# Three rows over V = 5, given as probabilities; the chain keeps the shortest prefix by
# probability whose mass reaches 0.8 (Holtzman et al. 2020):
#   A [.5, .2, .15, .1, .05]  cumulative .5 .7 .85      -> kept 3, kept mass .85
#   B [.9, .04, .03, .02, .01] cumulative .9            -> kept 1, kept mass .9
#   C [.3, .25, .2, .15, .1]  cumulative .3 .55 .75 .9  -> kept 4, kept mass .9
PROBS = [
    [0.5, 0.2, 0.15, 0.1, 0.05],
    [0.9, 0.04, 0.03, 0.02, 0.01],
    [0.3, 0.25, 0.2, 0.15, 0.1],
]
NUCLUS = "hand-nucleus"


def _entropy(p: list[float]) -> float:
    return -sum(x * math.log(x) for x in p if x > 0)


def _renormalised(p: list[float], k: int) -> list[float]:
    head = p[:k]
    return [x / sum(head) for x in head]


@pytest.fixture
def nucleus_registry(registry: Path) -> Path:
    """The demo registry plus a published hand-nucleus@1: top_p 0.8 alone."""
    folder = registry / NUCLUS
    folder.mkdir()
    (folder / "1.yaml").write_text(
        f"name: {NUCLUS}\nversion: 1\nowner: script-team\n"
        "summary: A nucleus cut alone, for worked examples.\n"
        "chain:\n  - top_p: 0.8\n",
        encoding="utf-8",
    )
    assert main(["policy", "publish", str(registry), NUCLUS]) == 0
    return registry


def _hand_shard(snapshot: object, probs: list[list[float]]) -> Shard:
    logits = np.log(np.asarray(probs)).astype(np.float16)
    requests = [
        Request((NUCLUS, 1), "control", 11 + i, logits[i : i + 1], [[]], 0)
        for i in range(len(probs))
    ]
    return served_shard(snapshot, "prompt-book-app", requests)  # type: ignore[arg-type]


def test_row_statistics_worked_example(nucleus_registry: Path) -> None:
    snapshot = load_registry(nucleus_registry)
    shard = _hand_shard(snapshot, PROBS)
    report = preview_capture([shard], [f"{NUCLUS}@1"], snapshot, resamples=20)
    got = {k: v["value"] for k, v in report.statistics[0].items()}
    # kept [3, 1, 4]; sorted [1, 3, 4]. Linear interpolation (Hyndman & Fan definition 7):
    # p10 at position .1 * 2 = .2 -> 1 + .2 * (3 - 1) = 1.4; p90 at 1.8 -> 3 + .8 * 1 = 3.8.
    assert got["kept_median"] == 3
    assert got["kept_p10"] == pytest.approx(1.4)
    assert got["kept_p90"] == pytest.approx(3.8)
    assert got["single_share"] == pytest.approx(1 / 3, rel=1e-5)
    assert got["kept_mass"] == pytest.approx((0.85 + 0.9 + 0.9) / 3, rel=1e-3)  # float16 rows
    raw = sum(_entropy(p) for p in PROBS) / 3
    after = (_entropy(_renormalised(PROBS[0], 3)) + 0.0 + _entropy(_renormalised(PROBS[2], 4))) / 3
    assert got["entropy_model"] == pytest.approx(raw, rel=1e-3)
    assert got["entropy_policy"] == pytest.approx(after, rel=1e-3)
    assert got["fallback_rate"] == 0
    # The kept-size histogram uses the metric's buckets 1, 2, 3, 5: sizes 1 | 3 | 4.
    assert report.kept_edges[:4] == [1, 2, 3, 5]
    assert report.kept_histograms[0][:4] == [1, 0, 1, 1]


def test_fallback_rate_counts_rows_with_invalid_entries(nucleus_registry: Path) -> None:
    snapshot = load_registry(nucleus_registry)
    rows = [*PROBS, [0.5, 0.2, 0.15, 0.1, 0.05]]
    logits = np.log(np.asarray(rows)).astype(np.float16)
    logits[3, 4] = np.nan  # DESIGN.md section 1: NaN is dropped, the row falls back
    requests = [Request((NUCLUS, 1), "control", 5, logits, [[]] * 4, 0)]
    shard = served_shard(snapshot, "prompt-book-app", requests)
    got = preview_capture([shard], [f"{NUCLUS}@1"], snapshot, resamples=20).statistics[0]
    assert got["fallback_rate"]["value"] == 0.25
    assert got["fallback_non_finite"]["value"] == 0.25
    assert got["fallback_empty"]["value"] == 0


def test_row_statistics_of_no_rows_are_undefined() -> None:
    empty = Rows(np.zeros(0, np.int64), np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0, str))
    assert all(math.isnan(v) for v in row_statistics(empty).values())


def test_distinct_n_li_2016_and_repetition_by_hand() -> None:
    # Li et al. 2016 (NAACL), distinct-n: distinct n-grams divided by all generated n-grams,
    # over the whole set of responses.
    conts = [[1, 2, 1, 2], [3, 3, 3]]
    # unigrams: 7 in all, {1, 2, 3} distinct -> 3/7
    assert distinct(conts, 1) == pytest.approx(3 / 7)
    # bigrams (1,2) (2,1) (1,2) | (3,3) (3,3): 5 in all, 3 distinct
    assert distinct(conts, 2) == pytest.approx(3 / 5)
    # trigrams (1,2,1) (2,1,2) | (3,3,3): all distinct
    assert distinct(conts, 3) == 1.0
    # repetition within one continuation: 1 - unique / total
    assert repetition([1, 2, 1, 2], 2) == pytest.approx(1 - 2 / 3)
    assert repetition([3, 3, 3], 2) == pytest.approx(1 - 1 / 2)
    assert repetition([3, 3, 3], 4) is None  # no 4-gram at all
    got = continuation_statistics(Continuations(conts, ["budget", "end"]))
    assert got["repetition_2"] == pytest.approx((1 / 3 + 1 / 2) / 2)
    assert got["repetition_3"] == 0.0
    assert got["repetition_4"] == 0.0  # averaged over the one continuation that has a 4-gram
    assert got["distinct_1"] == pytest.approx(3 / 7)
    assert got["length"] == 3.5
    assert (got["finish_budget"], got["finish_end"], got["finish_stop"]) == (0.5, 0.5, 0.0)


def test_distinct_shares_sum_to_distinct_and_ignore_self_duplicates() -> None:
    conts = [[1, 2, 1, 2], [3, 3, 3], [2, 1, 5]]
    for n in (1, 2, 3):
        shares, totals = distinct_shares(conts, n)
        assert shares.sum() / totals.sum() == pytest.approx(distinct(conts, n))
    # Drawing every continuation twice leaves the resampled ratio where it was; the plain
    # unique count would halve it.
    statistic = continuation_statistic(Continuations(conts, ["budget"] * 3))
    twice = np.array([0, 0, 1, 1, 2, 2], np.intp)
    assert statistic(twice)["distinct_2"] == pytest.approx(distinct(conts, 2))
    assert distinct([conts[i] for i in twice], 2) == pytest.approx(distinct(conts, 2) / 2)


# --- the bootstrap ----------------------------------------------------------------------------


def test_percentile_interval_is_the_quantiles_of_the_replicates() -> None:
    # Efron & Tibshirani 1993, eq. 13.5: the alpha and 1 - alpha percentiles of the replicates.
    reps = list(range(1, 102))  # 1..101: the 2.5% and 97.5% quantiles are 3.5 and 98.5
    i = percentile_interval(50.0, reps, 0.95)
    assert (i.low, i.high) == (
        pytest.approx(stats.scoreatpercentile(reps, 2.5)),
        pytest.approx(stats.scoreatpercentile(reps, 97.5)),
    )
    assert (i.low, i.high) == (pytest.approx(3.5), pytest.approx(98.5))


def test_paired_bootstrap_covers_the_true_difference_at_its_nominal_rate() -> None:
    # Paired data with a known truth: x ~ Exp(1) (mean 1), y = x + N(0.3, 0.5), so the mean
    # difference is 0.3. Over 200 simulated data sets the 90% intervals should cover the truth
    # about 90% of the time (binomial sd ~2%; the percentile method runs a little short at
    # small n, hence the asymmetric band).
    rng = np.random.default_rng(2024)
    covered_diff = covered_own = 0
    sims, n = 200, 60
    for _ in range(sims):
        x = rng.exponential(1.0, n)
        y = x + rng.normal(0.3, 0.5, n)

        def mean_of(a: np.ndarray) -> object:
            return lambda idx: {"mean": float(a[idx].mean())}

        b = paired_bootstrap(
            [mean_of(x), mean_of(y)],  # type: ignore[list-item]
            n,
            resamples=300,
            confidence=0.9,
            rng=rng,
        )
        d, own = b.difference[0]["mean"], b.own[0]["mean"]
        covered_diff += d.low <= 0.3 <= d.high
        covered_own += own.low <= 1.0 <= own.high
    assert 0.83 <= covered_diff / sims <= 0.96
    assert 0.80 <= covered_own / sims <= 0.96


def test_paired_differences_are_narrower_than_unpaired() -> None:
    # Pairing removes the shared row-to-row spread: the CI of y - x for y = x + small noise is
    # far narrower than either version's own interval.
    rng = np.random.default_rng(7)
    x = rng.normal(0, 3, 400)
    y = x + rng.normal(0.1, 0.1, 400)
    b = paired_bootstrap(
        [lambda i: {"m": float(x[i].mean())}, lambda i: {"m": float(y[i].mean())}],
        400,
        resamples=200,
        confidence=0.95,
        rng=rng,
    )
    d, own = b.difference[0]["m"], b.own[0]["m"]
    assert d.high - d.low < (own.high - own.low) / 10
    assert d.low <= d.value <= d.high


# --- replay of captured rows ------------------------------------------------------------------


def test_request_runs_group_a_seed_with_consecutive_streams() -> None:
    seed = np.array([9, 4, 9, 4, 9, 9], np.uint64)
    stream = np.array([1, 0, 0, 1, 2, 2], np.int64)  # the last row repeats seed 9, stream 2
    runs = [r.tolist() for r in request_runs(seed, stream)]
    assert runs == [[1, 3], [2, 0, 4], [5]]


def test_replay_of_the_served_version_reproduces_the_served_tokens(tmp_path: Path) -> None:
    snapshot = load_registry(ROOT / "policies")
    write_capture(tmp_path, snapshot, ARMS, shards=1, requests=30, vocab=1024)
    shard = read_shard(tmp_path / "shard-000.npz")
    for (name, version), _ in ARMS:
        out = replay_shard(snapshot.chain((name, version)), shard, shard.rows)
        mine = (shard.policy == name) & (shard.version == version)
        assert mine.sum() > 10
        np.testing.assert_array_equal(out.tokens[mine], shard.token[mine])
        np.testing.assert_array_equal(out.rows.kept[mine], shard.kept[mine])
        np.testing.assert_allclose(out.rows.kept_mass[mine], shard.kept_mass[mine], rtol=1e-6)
        # The other arm's rows drew other tokens somewhere: the replay is not an echo.
        assert (out.tokens[~mine] != shard.token[~mine]).any()


def test_preview_of_the_served_version_equals_the_served_statistics(tmp_path: Path) -> None:
    # All rows served by prompt-book@4: the preview's statistics for @4 are those of the
    # served diagnostics in the shard (what the live metrics saw), and @5 differs from it.
    snapshot = load_registry(ROOT / "policies")
    paths = write_capture(tmp_path, snapshot, [ARMS[1]], shards=2, requests=30, vocab=2048)
    shards = [read_shard(p) for p in paths]
    report = preview_capture(shards, ["prompt-book@4", "prompt-book@5"], snapshot, resamples=200)
    served = Rows(
        np.concatenate([s.kept for s in shards]).astype(np.int64),
        np.concatenate([s.entropy for s in shards]),
        np.zeros(sum(s.rows for s in shards)),
        np.concatenate([s.kept_mass for s in shards]),
        np.concatenate([s.fallback for s in shards]),
    )
    live = row_statistics(served)
    for name in ("kept_median", "kept_p10", "kept_p90", "single_share", "kept_mass"):
        assert report.statistics[0][name]["value"] == pytest.approx(live[name], rel=1e-5), name
    assert report.statistics[0]["entropy_model"]["value"] == pytest.approx(
        live["entropy_model"], rel=1e-5
    )
    assert report.served[0] == {"rows": sum(s.rows for s in shards), "same_token": 1.0}
    # prompt-book@5 keeps at least 2 (min_keep) and cuts at top_k 400 instead of 200.
    assert report.statistics[1]["single_share"]["value"] == 0
    diff = report.differences[0]["kept_median"]
    assert diff["low"] > 0 and diff["value"] > 0
    assert report.differences[0]["entropy_model"] == {"value": 0.0, "low": 0.0, "high": 0.0}


def test_same_seed_same_json_other_seed_other_intervals(tmp_path: Path) -> None:
    snapshot = load_registry(ROOT / "policies")
    paths = write_capture(tmp_path, snapshot, ARMS, shards=2, requests=20, vocab=512)
    refs = ["prompt-book@3", "prompt-book@4"]
    sweep = parse_sweep("temperature=0.6:1.0:0.2")

    def run(seed: int) -> str:
        shards = [read_shard(p) for p in paths]
        report = preview_capture(shards, refs, snapshot, seed, resamples=100, sweep=sweep)
        return dump_json(report)

    first = run(3)
    assert first == run(3)
    assert first != run(4)
    doc = json.loads(first)
    assert doc["sweep"]["values"] == [0.6, 0.8, 1.0]
    # Hotter rows are flatter: the entropy after policy grows with the temperature.
    entropies = doc["sweep"]["entropy_policy"]
    assert entropies == sorted(entropies) and entropies[0] < entropies[-1]


def test_sweep_of_nucleus_mass_keeps_supersets(nucleus_registry: Path) -> None:
    # Holtzman et al. 2020: a larger p keeps a prefix at least as long, so kept sizes (and the
    # median over rows) never shrink as top_p grows; at p = 1 every token is kept.
    snapshot = load_registry(nucleus_registry)
    rng = np.random.default_rng(1)
    probs = rng.dirichlet(np.ones(5) * 0.7, size=40).tolist()
    shard = _hand_shard(snapshot, probs)
    sweep = parse_sweep("top_p=0.2:1.0:0.2")
    report = preview_capture([shard], [f"{NUCLUS}@1"], snapshot, resamples=10, sweep=sweep)
    assert report.sweep is not None
    assert report.sweep.kept_mean == sorted(report.sweep.kept_mean)
    assert report.sweep.kept_mean[-1] == 5.0


def test_parse_sweep() -> None:
    assert parse_sweep("top_p=0.5:1.0:0.25").values == (0.5, 0.75, 1.0)
    assert parse_sweep("top_k=10:40:10").values == (10, 20, 30, 40)
    for bad in ("top_p", "top_p=1:0:0.1", "top_p=0:1:0", "top_p=a:b:c", "top_p=0:1000:1"):
        with pytest.raises(PreviewError):
            parse_sweep(bad)


def test_read_prompts() -> None:
    assert read_prompts("one\n\n  \ntwo\\nlines\n") == ["one", "two\nlines"]
    with pytest.raises(PreviewError):
        read_prompts("\n \n")


def test_progress_bar_only_when_enabled() -> None:
    assert bar_line("replay", 5, 10) == "replay [" + "#" * 15 + "-" * 15 + "]  50% 5/10"
    shown, quiet = io.StringIO(), io.StringIO()
    for stream, enabled in ((shown, True), (quiet, False)):
        bar = Progress(enabled, stream)
        bar.start("x", 3)
        bar.update(3)
        bar.finish()
    assert shown.getvalue().startswith("\rx [") and shown.getvalue().endswith("3/3\n")
    assert quiet.getvalue() == ""


def test_html_report_is_self_contained(tmp_path: Path) -> None:
    snapshot = load_registry(ROOT / "policies")
    paths = write_capture(tmp_path, snapshot, ARMS, shards=1, requests=10, vocab=256)
    report = preview_capture(
        [read_shard(p) for p in paths],
        ["prompt-book@3", "prompt-book@4"],
        snapshot,
        resamples=20,
        sweep=parse_sweep("temperature=0.5:1.0:0.25"),
    )
    page = render(report)
    for plot in ("plot-kept", "plot-entropy", "plot-sweep"):
        assert f'<figure class="plot" id="{plot}">' in page
    lowered = page.lower()
    for outside in ("http:", "https:", "src=", "href=", "@import", "url("):
        assert outside not in lowered
    assert page.count("<svg") == 4 and page.count("<title") == 5  # page + one per SVG


# --- the command ------------------------------------------------------------------------------


def test_cli_table_json_and_html(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    snapshot = load_registry(ROOT / "policies")
    write_capture(tmp_path / "cap", snapshot, ARMS, shards=2, requests=15, vocab=512)
    out_json, out_html = tmp_path / "r.json", tmp_path / "r.html"
    args = [
        "policy",
        "preview",
        "prompt-book@3",
        "prompt-book@4",
        "--capture",
        str(tmp_path / "cap"),
    ]
    args += ["--json", str(out_json), "--html", str(out_html), "--resamples", "50"]
    assert main(args) == 0
    table = capsys.readouterr().out
    assert "prompt-book@4 - prompt-book@3" in table and "kept_median" in table
    assert "replay drew the served token on 100.0%" in table
    doc = json.loads(out_json.read_text())
    assert doc["versions"] == ["prompt-book@3", "prompt-book@4"] and doc["rows"] > 30
    assert out_html.read_text().startswith("<!DOCTYPE html>")
    assert main([*args[:6], "--rows", "7", "--json", "-"]) == 0
    assert json.loads(capsys.readouterr().out)["rows"] == 7


def test_cli_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    snapshot = load_registry(ROOT / "policies")
    (tmp_path / "empty").mkdir()
    cap = tmp_path / "cap"
    write_capture(cap, snapshot, ARMS, shards=1, requests=5, vocab=128)
    preview = ["policy", "preview"]
    cases = [
        (
            [*preview, "prompt-book@9", "--capture", str(cap)],
            "unknown policy version prompt-book@9",
        ),
        ([*preview, "prompt-book", "--capture", str(cap)], "expected a policy reference"),
        ([*preview, "prompt-book@4", "--capture", str(tmp_path / "empty")], "no readable capture"),
        ([*preview, "prompt-book@4", "--capture", str(tmp_path / "gone")], "no such capture"),
        (
            [*preview, "prompt-book@4", "--capture", str(cap), "--sweep", "top_p=0.5:1:0.1"],
            "has no such stage",
        ),
        ([*preview, "prompt-book@4", "--capture", str(cap), "--budget", "5"], "--prompts only"),
        ([*preview, "prompt-book@4", "--prompts", str(tmp_path / "none.txt")], "cannot be read"),
    ]
    for argv, needle in cases:
        assert main(argv) == 1, argv
        err = capsys.readouterr().err
        assert err.startswith("keepset: ") and needle in err, (argv, err)
    with pytest.raises(SystemExit) as exc:  # one source, not both
        main([*preview, "prompt-book@4", "--capture", str(cap), "--prompts", "p.txt"])
    assert exc.value.code == 2


def test_cli_skips_an_unreadable_shard_with_a_warning(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    snapshot = load_registry(ROOT / "policies")
    cap = tmp_path / "cap"
    write_capture(cap, snapshot, ARMS, shards=1, requests=5, vocab=128)
    (cap / "shard-broken.npz").write_bytes(b"not a zip file")
    argv = ["policy", "preview", "prompt-book@4", "--capture", str(cap), "--json", "-"]
    assert main([*argv, "--resamples", "10"]) == 0
    captured = capsys.readouterr()
    assert "keepset: warning: skipped" in captured.err and "shard-broken.npz" in captured.err
    doc = json.loads(captured.out)
    assert len(doc["skipped"]) == 1 and len(doc["sources"]) == 1
    (cap / "shard-000.npz").unlink()
    assert main(argv) == 1
    assert "no readable capture shard" in capsys.readouterr().err


def test_an_empty_shard_is_an_empty_capture(tmp_path: Path) -> None:
    snapshot = load_registry(ROOT / "policies")
    shard = served_shard(snapshot, "prompt-book-app", [])
    write_shard(tmp_path / "empty.npz", shard)
    with pytest.raises(PreviewError, match="no rows"):
        preview_capture([read_shard(tmp_path / "empty.npz")], ["prompt-book@4"], snapshot)


# --- prompt mode ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def model() -> Model:
    return Model(BUNDLED, threads=1)


def test_prompt_mode_on_the_bundled_model(model: Model) -> None:
    snapshot = load_registry(ROOT / "policies")
    prompts = read_prompts((ROOT / "service" / "preview" / "prompts.txt").read_text())[:3]
    refs = ["prompt-book@3", "prompt-book@5"]

    def run() -> str:
        report = preview_prompts(model, prompts, refs, snapshot, 5, budget=6, resamples=50)
        return dump_json(report)

    text = run()
    assert text == run()
    doc = json.loads(text)
    assert doc["unit"] == "continuation" and doc["units"] == 3
    for version in refs:
        s = doc["statistics"][version]
        assert 0 < s["length"]["value"] <= 6
        assert 0 < s["distinct_1"]["value"] <= 1
        assert s["finish_budget"]["value"] + s["finish_end"]["value"] + s["finish_stop"][
            "value"
        ] == pytest.approx(1)
    # The continuation of prompt i is the one PromptRun gives under prompt_seed(seed, i).
    ref = ("prompt-book", 3)
    chain, policy = snapshot.chain(ref), snapshot.policy(ref)
    got = generate(model, chain, policy, prompts, 5, 6, None, Progress(False), "")
    for i, prompt in enumerate(prompts):
        direct = PromptRun(model, chain, prompt, budget=6, seed=prompt_seed(5, i), stop=policy.stop)
        steps = list(direct)
        tokens = [r.token for r in steps]
        if direct.finish == "end":
            tokens = tokens[:-1]
        assert got.continuations.tokens[i] == tokens
        assert got.continuations.finish[i] == direct.finish
        assert got.lengths[i] == len(steps)
    assert sum(got.lengths) == got.rows.size


def test_prompt_seeds_are_fixed_and_distinct() -> None:
    seeds = [prompt_seed(0, i) for i in range(100)]
    assert len(set(seeds)) == 100 and all(0 <= s < 2**53 for s in seeds)
    assert prompt_seed(0, 1) == prompt_seed(0, 1) != prompt_seed(1, 1)


def test_prompt_mode_sweep_and_cli(
    model: Model, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    snapshot = load_registry(ROOT / "policies")
    prompts = ["The stage manager of the Lantern Row Players", "Backstage, the prompt-book"]
    sweep = parse_sweep("temperature=0.5:1.0:0.5")
    report = preview_prompts(
        model, prompts, ["prompt-book@4"], snapshot, budget=4, resamples=10, sweep=sweep
    )
    assert report.sweep is not None and report.sweep.values == [0.5, 1.0]
    assert set(report.sweep.distinct) == {"distinct_1", "distinct_2", "distinct_3", "repetition_2"}
    # A hotter temperature flattens every row: the mean entropy after the policy grows.
    assert report.sweep.entropy_policy[0] < report.sweep.entropy_policy[1]
    file = tmp_path / "prompts.txt"
    file.write_text("\n".join(prompts) + "\n", encoding="utf-8")
    argv = ["policy", "preview", "prompt-book@3", "prompt-book@4", "--prompts", str(file)]
    assert main([*argv, "--budget", "3", "--resamples", "10", "--json", "-"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["mode"] == "prompts" and doc["units"] == 2
    assert doc["statistics"]["prompt-book@4"]["length"]["value"] <= 3
    assert "distinct_2" in doc["differences"]["prompt-book@4"]
