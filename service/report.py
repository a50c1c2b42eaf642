"""The text of ``keepset experiment report``: the ``GET /v1/routes`` answer as one table per
client (arms, requests, outcomes, mean and interval, difference from the control with its
p-value, label shares) and the sample-ratio check. Formatting only: every number comes from the
service.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any


def _num(value: float | None) -> str:
    return "-" if value is None else f"{value:.4g}"


def _signed(value: float | None) -> str:
    return "-" if value is None else f"{value:+.4g}"


def _p(value: float | None) -> str:
    if value is None:
        return "-"
    return f"{value:.2g}" if value >= 1e-4 else f"{value:.1e}"


def _interval(ci: Sequence[float] | None) -> str:
    return "" if ci is None else f"[{ci[0]:.4g}, {ci[1]:.4g}]"


def _percent(share: float | None, ci: Sequence[float] | None) -> str:
    if share is None or ci is None:
        return "-"
    return f"{100 * share:.1f}% [{100 * ci[0]:.1f}, {100 * ci[1]:.1f}]"


def _points(difference: float | None, ci: Sequence[float] | None) -> str:
    """A difference of shares in percentage points."""
    if difference is None or ci is None:
        return "-"
    return f"{100 * difference:+.1f} pts [{100 * ci[0]:+.1f}, {100 * ci[1]:+.1f}]"


def _table(rows: list[list[str]]) -> list[str]:
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    return [
        "  " + "  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)).rstrip()
        for row in rows
    ]


def render_client(name: str, entry: Mapping[str, Any]) -> list[str]:
    split = entry.get("split", {})
    outcomes = entry.get("outcomes")
    lines = [name]
    requests = split.get("requests", {})
    counts = ", ".join(f"{arm}: {n}" for arm, n in requests.items())
    if split.get("p_value") is None:
        lines.append(f"  split: {counts} (no check: one arm or no traffic)")
    else:
        lines.append(
            f"  split: {counts}; sample-ratio chi-square {_num(split['chi_square'])},"
            f" p = {_p(split['p_value'])}"
        )
    if outcomes is None:
        return [*lines, "  (this service reports no outcomes)"]
    control = outcomes["control"]
    versus = outcomes["versus_control"]
    rows = [
        [
            "arm",
            "policy",
            "requests",
            "outcomes",
            "mean [95% CI]",
            "diff vs control [95% CI]",
            "p (Welch t)",
        ]
    ]
    for arm, got in outcomes["arms"].items():
        value = got["value"]
        mean = f"{_num(value['mean'])} {_interval(value['ci95'])}".strip()
        if value["mean"] is None:
            mean = "-"
        diff, p = "(control)" if arm == control else "-", ""
        if arm in versus:
            test = versus[arm]["value"]
            diff = f"{_signed(test['difference'])} {_interval(test['ci95'])}".strip()
            p = _p(test["p_value"]) if test["reason"] is None else test["reason"]
        rows.append([arm, got["policy"], str(got["requests"]), str(got["outcomes"]), mean, diff, p])
    lines += _table(rows)
    if outcomes["labels"]:
        rows = [
            [
                "label",
                "arm",
                "labelled",
                "share [95% CI]",
                "diff vs control [95% CI]",
                "p (chi-square)",
            ]
        ]
        for label in outcomes["labels"]:
            for arm, got in outcomes["arms"].items():
                share = got["labels"][label]
                diff, p = "(control)" if arm == control else "-", ""
                if arm in versus:
                    test = versus[arm]["labels"][label]
                    diff = _points(test["difference"], test["ci95"])
                    p = _p(test["p_value"]) if test["reason"] is None else test["reason"]
                rows.append(
                    [
                        label,
                        arm,
                        str(got["labelled"]),
                        _percent(share["share"], share["ci95"]),
                        diff,
                        p,
                    ]
                )
        lines += _table(rows)
    lines.append(f"  outcomes since {outcomes['since']}")
    return lines


def render_report(clients: Mapping[str, Any]) -> str:
    """Every client's table, separated by a blank line."""
    blocks = ["\n".join(render_client(name, entry)) for name, entry in clients.items()]
    return "\n\n".join(blocks)
