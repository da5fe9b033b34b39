"""The design document is the repository's own: every citation of it names a section it has,
and nothing points at a design file outside the repository."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DESIGN = ROOT / "docs" / "design.md"
CITED = re.compile(r"docs/design\.md,? §(\d+(?:\.\d+)*)")
SEARCHED = ("labrun", "tests", "sweeps", "drivers", "sim_instruments", "benchmarks", "docs")
TOP_FILES = ("README.md", "DEVELOPERS.md", "CHANGELOG.md", "pyproject.toml")


def _texts() -> dict[Path, str]:
    """Every text file the repository ships or tests with."""
    files = [ROOT / f for f in TOP_FILES]
    for folder in SEARCHED:
        files += [p for p in (ROOT / folder).rglob("*")
                  if p.is_file() and p.suffix in {".py", ".toml", ".md", ".yaml", ".txt"}]
    return {p: p.read_text(encoding="utf-8") for p in files}


def _sections() -> set[str]:
    """Section numbers of docs/design.md, from its '## 5.' / '### 5.2' headings."""
    return set(re.findall(r"^#{2,4} (\d+(?:\.\d+)*)\.? ", DESIGN.read_text(encoding="utf-8"),
                          flags=re.MULTILINE))


def test_design_sections_cited_in_the_repository_exist() -> None:
    sections = _sections()
    assert {"2", "2.1", "3", "5.2", "5.6", "6", "7"} <= sections
    cited = {(p.relative_to(ROOT).as_posix(), n) for p, text in _texts().items()
             for n in CITED.findall(text)}
    assert len(cited) > 20  # the physics and tests cite it throughout
    missing = sorted(c for c in cited if c[1] not in sections)
    assert not missing, f"citations of sections docs/design.md does not have: {missing}"


def test_no_reference_to_a_design_file_outside_the_repository() -> None:
    outside = "DESIGN" + ".md"  # spelled apart so this file does not match itself
    found = sorted(p.relative_to(ROOT).as_posix() for p, text in _texts().items()
                   if outside in text or "shared/" + "design" in text.lower())
    # Binary files too (the fixture store keeps plan text with its comments).
    found += sorted(p.relative_to(ROOT).as_posix() for folder in SEARCHED
                    for p in (ROOT / folder).rglob("*")
                    if p.is_file() and "__pycache__" not in p.parts
                    and outside.encode() in p.read_bytes())
    assert not found, f"{outside} referenced in {found}"
