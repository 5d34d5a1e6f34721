"""The README's links lead somewhere: every ``#anchor`` is a heading, every relative path a file,
and the contents list every section that follows it.

Anchors are made as GitHub makes them for headings (common practice, GitHub's renderer, from
memory): the heading's text as shown (no backticks), lower-cased, characters other than letters,
digits, spaces, ``-`` and ``_`` dropped, spaces turned into ``-``; a repeated anchor gets ``-1``,
``-2``, ... in order.
"""

from __future__ import annotations

import re

from readme_blocks import README, blocks, sections

_TEXT = README.read_text(encoding="utf-8")
_LINK = re.compile(r"\]\(([^)\s]+)\)")
_HEADING = re.compile(r"^(#{1,6}) (.+)$")


def _prose(text: str) -> str:
    """The README without its code blocks (a "# comment" in a shell block is no heading)."""
    lines = text.splitlines()
    for block in blocks(text):
        for index in range(block.line - 1, block.line + block.text.count("\n") + 1):
            lines[index] = ""
    return "\n".join(lines)


def anchor(heading: str) -> str:
    shown = heading.replace("`", "").strip().lower()
    return re.sub(r"[^\w\- ]", "", shown).replace(" ", "-")


def _anchors(text: str) -> set[str]:
    seen: dict[str, int] = {}
    found = set()
    for line in _prose(text).splitlines():
        match = _HEADING.match(line)
        if match:
            base = anchor(match.group(2))
            count = seen.get(base, 0)
            seen[base] = count + 1
            found.add(base if count == 0 else f"{base}-{count}")
    return found


def test_anchor_follows_githubs_rule_on_the_readmes_own_kinds_of_heading():
    assert anchor("Bundle format (`rbfgate-bundle/2`)") == "bundle-format-rbfgate-bundle2"
    assert anchor("Limits of `rbfgate serve`") == "limits-of-rbfgate-serve"
    assert anchor("Health, metrics and logs") == "health-metrics-and-logs"


def test_every_anchor_link_names_a_heading():
    anchors = _anchors(_TEXT)
    links = [target[1:] for target in _LINK.findall(_prose(_TEXT)) if target.startswith("#")]
    assert len(links) > 40, "the README's links were not found"
    assert sorted(set(links) - anchors) == []


def test_every_relative_link_names_a_file_in_the_repository():
    targets = [target for target in _LINK.findall(_prose(_TEXT)) if not target.startswith(("#", "http://", "https://"))]
    assert targets, "the README links DEVELOPERS.md and its screenshots"
    assert [target for target in targets if not (README.parent / target.split("#")[0]).is_file()] == []


def test_the_contents_list_every_section_after_them():
    headings = sections(_TEXT)
    listed = set(re.findall(r"\]\(#([^)]+)\)", _TEXT.split("\n## Contents\n", 1)[1].split("\n## ", 1)[0]))
    after = headings[headings.index("Contents") + 1:]
    assert [heading for heading in after if anchor(heading) not in listed] == []
