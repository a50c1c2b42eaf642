"""The registry, the lock, routes, keys and the CLI verbs, on real files."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from conftest import ROOT
from scipy import stats

from service.cli import main
from service.keys import add_key, load_keyring
from service.policy import AdjustError, apply_adjust, policy_schema_text
from service.registry import load_registry, reload_registry
from service.routing import Arm, choose_arm, stable_point


def test_demo_registry_is_valid() -> None:
    snapshot = load_registry(ROOT / "policies")
    assert snapshot.valid, snapshot.problem_lines()
    assert snapshot.policy_count() == 8 and len(snapshot.routes) == 4


def test_shipped_schema_matches_the_model() -> None:
    assert (ROOT / "policies" / "policy.schema.json").read_text() == policy_schema_text()


def test_tampered_version_is_refused(registry: Path) -> None:
    path = registry / "box-office" / "1.yaml"
    path.write_text(path.read_text().replace("top_k: 20", "top_k: 21"))
    snapshot = load_registry(registry)
    assert any("box-office/1.yaml: tampered" in line for line in snapshot.problem_lines())
    assert ("box-office", 1) not in snapshot.policies
    assert main(["policy", "check", str(registry)]) == 1


def test_unpublished_and_mismatched_files(registry: Path) -> None:
    text = (registry / "box-office" / "1.yaml").read_text()
    (registry / "box-office" / "2.yaml").write_text(text.replace("version: 1", "version: 2"))
    lines = load_registry(registry).problem_lines()
    assert any("box-office/2.yaml: not published" in line for line in lines)
    # publish then check passes
    assert main(["policy", "publish", str(registry), "box-office"]) == 0
    assert main(["policy", "check", str(registry)]) == 0
    # a file whose version field disagrees with its name cannot be published
    (registry / "box-office" / "3.yaml").write_text(text.replace("version: 1", "version: 7"))
    assert main(["policy", "publish", str(registry), "box-office"]) == 1


def test_field_errors_name_file_and_field(registry: Path) -> None:
    bad = registry / "surtitles" / "2.yaml"
    text = (registry / "surtitles" / "1.yaml").read_text()
    bad.write_text(text.replace("version: 1", "version: 2").replace("top_p: 0.8", "top_p: 1.8"))
    assert main(["policy", "publish", str(registry), "surtitles"]) == 1
    with open(registry / "published.lock", "a") as lock:
        import hashlib

        lock.write(f"surtitles 2 {hashlib.sha256(bad.read_bytes()).hexdigest()}\n")
    lines = load_registry(registry).problem_lines()
    line = next(x for x in lines if x.startswith("surtitles/2.yaml"))
    assert "chain" in line and "top_p" in line and "(0, 1]" in line


def test_fallback_unresolved_and_cycle(registry: Path) -> None:
    import hashlib

    def publish_raw(name: str, version: int, body: str) -> None:
        path = registry / name / f"{version}.yaml"
        path.write_text(body)
        with open(registry / "published.lock", "a") as lock:
            lock.write(f"{name} {version} {hashlib.sha256(path.read_bytes()).hexdigest()}\n")

    base = yaml.safe_load((registry / "box-office" / "1.yaml").read_text())
    publish_raw("box-office", 2, yaml.safe_dump({**base, "version": 2, "fallback": "nowhere@1"}))
    publish_raw("box-office", 3, yaml.safe_dump({**base, "version": 3, "fallback": "box-office@4"}))
    publish_raw("box-office", 4, yaml.safe_dump({**base, "version": 4, "fallback": "box-office@3"}))
    lines = load_registry(registry).problem_lines()
    assert any("2.yaml: fallback: nowhere@1 is not a loaded" in x for x in lines)
    assert any("3.yaml: fallback: the fallbacks form a cycle" in x for x in lines)


def test_reload_keeps_last_good(registry: Path) -> None:
    good = load_registry(registry)
    (registry / "routes.yaml").write_text("clients: [oops")
    kept, report = reload_registry(good, registry)
    assert kept is good and not report.ok and "routes.yaml" in report.refused[0].file


def test_adjust_rules(registry: Path) -> None:
    snapshot = load_registry(registry)
    p3, p4 = snapshot.find("prompt-book", 3), snapshot.find("prompt-book", 4)
    assert p3 is not None and p4 is not None
    with pytest.raises(AdjustError) as err:
        apply_adjust(p3, {"temperature": 2.0})
    assert err.value.reason == "out_of_range"
    chain, clamped = apply_adjust(p4, {"temperature": 2.0, "min_p": 0.01})
    assert clamped == ["min_p", "temperature"]
    assert chain.stages[1].param == 1.1 and chain.stages[3].param == 0.02
    with pytest.raises(AdjustError) as err:
        apply_adjust(p3, {"top_k": 10})
    assert err.value.reason == "not_adjustable"


def test_ab_split_matches_weights_chi_square() -> None:
    # 10 000 routing keys over 70/30: within 2 points of the weights, and SciPy's chi-square
    # goodness-of-fit test does not reject the configured split.
    arms = [Arm(("a", 1), 70), Arm(("b", 1), 30)]
    picks = [choose_arm("prompt-book-app", f"user-{i}", arms, rng=None) for i in range(10_000)]  # type: ignore[arg-type]
    counts = np.bincount(picks, minlength=2)
    assert abs(counts[0] / 10_000 - 0.7) < 0.02
    assert stats.chisquare(counts, [7000, 3000]).pvalue > 1e-3


def test_sticky_across_processes() -> None:
    here = [stable_point("usher-desk", f"key-{i}", 100) for i in range(50)]
    code = (
        "from service.routing import stable_point;"
        "print([stable_point('usher-desk', f'key-{i}', 100) for i in range(50)])"
    )
    other = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        env={"PYTHONHASHSEED": "123", "PATH": ""},
    )
    assert json.loads(other.stdout) == here


def test_keys_lookup_and_add(tmp_path: Path) -> None:
    path = tmp_path / "keys.yaml"
    a = add_key(path, "usher-desk")
    b = add_key(path, "stage-manager", "admin")
    ring = load_keyring(path)
    who = ring.identify(a)
    assert who is not None and (who.name, who.role) == ("usher-desk", "client")
    who = ring.identify(b)
    assert who is not None and who.role == "admin"
    assert ring.identify(a + "x") is None and ring.identify("") is None
    assert a not in path.read_text()  # only the hash is stored
    with pytest.raises(ValueError, match="already has a key"):
        add_key(path, "usher-desk")


def test_cli_keys_add_and_diff(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    keys = tmp_path / "k.yaml"
    assert main(["keys", "add", "surtitle-booth", "--keys", str(keys)]) == 0
    key = capsys.readouterr().out.strip()
    assert load_keyring(keys).identify(key) is not None
    assert (
        main(
            [
                "policy",
                "diff",
                "prompt-book@3",
                "prompt-book@4",
                "--policies",
                str(ROOT / "policies"),
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    assert "~ chain[3]:" in out and "+ adjustable.min_p" in out and "on_out_of_range" in out


def test_cli_as_a_process() -> None:
    result = subprocess.run(
        [sys.executable, "-m", "service.cli", "policy", "check", str(ROOT / "policies")],
        capture_output=True,
        text=True,
    )
    assert result.returncode == 0 and "ok: 8 policy versions" in result.stdout
    result = subprocess.run(
        [sys.executable, "-m", "service.cli", "policy", "check", "/nonexistent"],
        capture_output=True,
        text=True,
    )
    assert result.returncode == 1 and "does not exist" in result.stdout
