"""Every source a comment or document cites is in the repository.

Source: common practice (a citation a maintainer cannot open cannot be checked).
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
REFERENCES = ROOT / "docs" / "references.md"
# "docs/references.md §N", also wrapped over a line break (with a comment marker on the next line)
CITATION = re.compile(r"docs/references\.md\s*(?:#\s*)?§(\d+)")
SECTION = re.compile(r"^## §(\d+) \S", re.MULTILINE)
# files outside the repository: the guides it was written from, and the machine's own folders (a run's
# "<run>/work/output" scratch path inside the app workspace is not one of them)
OUTSIDE = re.compile(r"REFERENCES\.md|STYLE\.md|/work/(?!output\b)")


def _cited_files():
    for folder in ("landcheck", "tests", "docs", "scripts"):
        for path in sorted((ROOT / folder).rglob("*")):
            if path.suffix in {".py", ".md", ".toml"} and "vendor" not in path.parts:
                yield path
    yield ROOT / "README.md"
    yield ROOT / "DEVELOPERS.md"


def _sections() -> list[int]:
    return [int(n) for n in SECTION.findall(REFERENCES.read_text(encoding="utf-8"))]


def test_sections_are_numbered_in_order_and_name_a_source():
    numbers = _sections()
    assert numbers == list(range(1, len(numbers) + 1))
    text = REFERENCES.read_text(encoding="utf-8")
    bodies = re.split(r"^## §\d+ ", text, flags=re.MULTILINE)[1:]
    for n, body in zip(numbers, bodies):
        # each section carries a year-dated published source or says how its values were derived
        assert re.search(r"\b(19|20)\d\d\b", body) or "[D" in body or "[C]" in body, f"§{n} names no source"


def test_every_citation_exists():
    sections = set(_sections())
    cited = {}
    for path in _cited_files():
        if path == Path(__file__).resolve():
            continue
        for m in CITATION.finditer(path.read_text(encoding="utf-8")):
            cited.setdefault(int(m.group(1)), []).append(path.relative_to(ROOT).as_posix())
    assert len(cited) >= 10  # the tests do cite the page
    missing = {f"§{n}": where for n, where in cited.items() if n not in sections}
    assert not missing, f"cited but not in docs/references.md: {missing}"


def test_nothing_cites_a_file_outside_the_repository():
    offenders = []
    for path in _cited_files():
        if path == Path(__file__).resolve():
            continue
        for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if OUTSIDE.search(line):
                offenders.append(f"{path.relative_to(ROOT)}:{i}: {line.strip()}")
    assert not offenders, "\n".join(offenders)
