"""The plain-text form of a swap preview, as ``rbfgate preview`` prints it."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from model_store.store.preview import PreviewReport

__all__ = ["render"]


def render(report: "PreviewReport") -> str:
    total = sum(report.sources.values())
    lines = [
        f"preview of {report.model}: candidate {report.candidate['version']} "
        f"(digest {report.candidate['digest'][:16]}...) against active {report.active['version']} "
        f"(digest {report.active['digest'][:16]}...)",
        "rows: " + ", ".join(f"{count} {source}" for source, count in report.sources.items())
        + f"; {report.scored_by_both} of {total} accepted by both versions",
    ]
    share = f" ({100.0 * report.flips / report.scored_by_both:.1f}%)" if report.scored_by_both else ""
    by_source = ", ".join(f"{count} in {source}" for source, count in report.flips_by_source.items() if count)
    lines.append(
        f"labels that would flip: {report.flips} of {report.scored_by_both}{share}" + (f" ({by_source})" if by_source else "")
    )
    lines.extend(_table(report.flip_table))
    if report.comparable_note:
        lines.append(f"note: {report.comparable_note}")
    for title, change in (
        ("largest decision change", report.largest_decision_change),
        ("largest probability change", report.largest_probability_change),
    ):
        if change is not None:
            column = "" if change["class"] is None else f", class {change['class']}"
            lines.append(
                f"{title}: {change['change']:.6g} ({change['active']:.6g} -> {change['candidate']:.6g}) "
                f"at {change['source']} row {change['row']}{column}"
            )
    lines.append(f"refused by the candidate but accepted by the active version: {report.refused_by_candidate_only}")
    lines.extend(_examples(report.examples.get("candidate_only", []), report.refused_by_candidate_only))
    lines.append(f"refused by the active version but accepted by the candidate: {report.refused_by_active_only}")
    lines.extend(_examples(report.examples.get("active_only", []), report.refused_by_active_only))
    lines.append(f"refused by both: {report.refused_by_both}")
    if report.range_changes:
        lines.append("allowed ranges that changed:")
        for change in report.range_changes:
            lines.append(f"  {change['feature']}: {_range(change['active'])} -> {_range(change['candidate'])}")
    else:
        lines.append("allowed ranges that changed: none")
    lines.extend(_domain(report.domain_changes, report.scored_by_both))
    lines.extend(report.contract.render_lines())
    lines.append("nothing was changed in the store")
    return "\n".join(lines)


def _table(table: dict[str, Any]) -> list[str]:
    columns = [str(label) for label in table["candidate_classes"]]
    rows = [str(label) for label in table["active_classes"]]
    corner = "active \\ candidate"
    first = max(len(corner), *(len(row) for row in rows))
    widths = [max(len(column), *(len(str(counts[index])) for counts in table["counts"])) for index, column in enumerate(columns)]
    header = "  " + corner.ljust(first) + "".join("  " + column.rjust(width) for column, width in zip(columns, widths))
    body = [
        "  " + row.ljust(first) + "".join("  " + str(count).rjust(width) for count, width in zip(counts, widths))
        for row, counts in zip(rows, table["counts"])
    ]
    return [header, *body]


def _examples(examples: list[dict[str, Any]], total: int) -> list[str]:
    lines = []
    for example in examples:
        problems = "; ".join(_problem(problem) for problem in example["problems"])
        lines.append(f"  {example['source']} row {example['row']}: {problems}")
    if total > len(examples):
        lines.append(f"  ... and {total - len(examples)} more")
    return lines


def _problem(problem: dict[str, Any]) -> str:
    reason = problem["reason"].replace("_", " ")
    if problem["reason"] == "out_of_range":
        low, high = problem["allowed"]
        return f"{problem['feature']}={problem['value']} outside [{low:g}, {high:g}]"
    if problem["reason"] in ("missing", "unknown_feature"):
        return f"{problem['feature']}: {reason}"
    return f"{problem['feature']}={problem['value']!r}: {reason}"


def _range(allowed) -> str:
    return "(not a feature)" if allowed is None else f"[{allowed[0]:g}, {allowed[1]:g}]"


def _domain(changes: dict[str, Any], scored: int) -> list[str]:
    if not changes:
        return []
    lines = [f"domain verdicts that would change: {changes['changed']} of {scored}"]
    verdicts = changes["verdicts"]
    used = [index for index in range(len(verdicts))
            if any(changes["counts"][index]) or any(row[index] for row in changes["counts"])]
    table = {"active_classes": [verdicts[i] for i in used], "candidate_classes": [verdicts[i] for i in used],
             "counts": [[changes["counts"][i][j] for j in used] for i in used]}
    return lines + _table(table) if used else lines
