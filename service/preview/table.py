"""The terminal table of a policy preview: versions side by side, then each version's difference
from the first with its bootstrap interval."""

from __future__ import annotations

from typing import Any

from service.preview.replay import PreviewReport


def number(x: float | None) -> str:
    if x is None:
        return "-"
    if x == 0 or 0.01 <= abs(x) < 100_000:
        return f"{x:.3f}".rstrip("0").rstrip(".") if x != int(x) else f"{x:.0f}"
    return f"{x:.3g}"


def cell(interval: dict[str, Any], signed: bool = False) -> str:
    value = interval["value"]
    text = number(value)
    if signed and value is not None and value > 0:
        text = "+" + text
    if interval["low"] is None:
        return text
    return f"{text} [{number(interval['low'])}, {number(interval['high'])}]"


def table(report: PreviewReport) -> str:
    """The report as aligned text columns (one line per statistic)."""
    level = f"{report.confidence:.0%}"
    unit = "rows" if report.mode == "capture" else "continuations"
    head = [f"statistic ({level} CI)"]
    head += report.versions
    head += [f"{v} - {report.versions[0]}" for v in report.versions[1:]]
    lines = [head]
    for name in report.statistics[0]:
        line = [name]
        line += [cell(s[name]) for s in report.statistics]
        line += [cell(d[name], signed=True) for d in report.differences]
        lines.append(line)
    widths = [max(len(r[i]) for r in lines) for i in range(len(head))]
    text = [
        "  ".join(
            c.ljust(w) if i == 0 else c.rjust(w)
            for i, (c, w) in enumerate(zip(r, widths, strict=True))
        )
        for r in lines
    ]
    text.insert(1, "  ".join("-" * w for w in widths))
    summary = f"{report.mode} preview: {report.rows} rows"
    if report.mode == "prompts":
        summary += f" from {report.units} continuations"
    summary += f"; {report.resamples} bootstrap resamples of the {unit} (seed {report.seed})"
    out = [summary, *text]
    for version, served in zip(report.versions, report.served, strict=False):
        if served["rows"]:
            out.append(
                f"{version} served {served['rows']} captured rows; replay drew the served token "
                f"on {served['same_token']:.1%} of them"
            )
    if report.skipped:
        out.append(f"skipped {len(report.skipped)} unreadable file(s)")
    if report.sweep is not None:
        s = report.sweep
        out.append("")
        out.append(f"sweep of {s.field} on {report.versions[0]}:")
        extra = list(s.distinct)
        out.append(
            "  ".join(
                [s.field.rjust(10), "kept median", "kept mean", "entropy after policy", *extra]
            )
        )
        for i, value in enumerate(s.values):
            cells = [
                number(value).rjust(10),
                number(s.kept_median[i]).rjust(11),
                number(s.kept_mean[i]).rjust(9),
                number(s.entropy_policy[i]).rjust(20),
            ]
            cells += [number(s.distinct[k][i]).rjust(len(k)) for k in extra]
            out.append("  ".join(cells))
    return "\n".join(out)
