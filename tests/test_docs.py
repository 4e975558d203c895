"""docs/validation.md stays in step with the tests, and the documentation links resolve.

validation.md has one section per test file (a heading naming ``tests/....py``). A test
file that cites a published source (an author and a year, e.g. "Surname 1999" or
"Surname et al. 2014") or uses a reference library (quantecon, scipy) must have a section
that cites the same; every test file named in validation.md must exist.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"
VALIDATION = DOCS / "validation.md"

# The surname just before the year (after "et al." if present): "Briggs, Ades & Price
# 2003" -> "Price 2003"; "Strong et al. 2014" -> "Strong 2014".
CITATION = re.compile(
    r"(?<![^\W\d_])([A-Z][^\W\d_]*(?:['\-][^\W\d_]+)*)(?:\s+et\s+al\.?)?,?\s+\(?"
    r"((?:19|20)\d\d)[a-z]?\b"
)
LIBRARIES = ("quantecon", "scipy")
HEADING = re.compile(r"^#{2,4}\s.*`(tests/[\w/]+\.py)`", re.MULTILINE)
TEST_PATH = re.compile(r"`(tests/[\w/]+\.py)`")


def citations(text: str) -> set[str]:
    """Set of "Surname YEAR" keys cited in ``text``."""
    return {f"{name} {year}" for name, year in CITATION.findall(text)}


def libraries(text: str) -> set[str]:
    """Reference libraries imported or called in ``text`` (``import x``, ``x.attr``)."""
    return {
        name for name in LIBRARIES if re.search(rf"\b(?:import|from)\s+{name}\b|\b{name}\.\w", text)
    }


def sections(markdown: str) -> dict[str, str]:
    """Map each test file heading of validation.md to the text of its section."""
    found = list(HEADING.finditer(markdown))
    out: dict[str, str] = {}
    for i, match in enumerate(found):
        end = found[i + 1].start() if i + 1 < len(found) else len(markdown)
        out[match.group(1)] = markdown[match.end() : end]
    return out


def _test_files() -> list[Path]:
    # This file is left out: its own examples of the citation forms are not sources.
    return sorted(
        p for p in (ROOT / "tests").rglob("*.py") if p.name not in ("__init__.py", "test_docs.py")
    )


def test_the_citation_pattern_reads_the_usual_forms():
    text = (
        "Source: Briggs, Ades & Price 2003; Strong et al. 2014; Beck, Kassirer & "
        "Pauker 1982, Am J Med; (Cantor 1994); Miller & Homan 1994; Jones, Epstein & "
        "Garcia-Mochon 2017; Büyükkaramikli et al. 2019. No year: Table 3, page 2010."
    )
    assert citations(text) == {
        "Price 2003",
        "Strong 2014",
        "Pauker 1982",
        "Cantor 1994",
        "Homan 1994",
        "Garcia-Mochon 2017",
        "Büyükkaramikli 2019",
    }
    assert libraries("from quantecon.markov import DiscreteDP; import scipy.linalg") == {
        "quantecon",
        "scipy",
    }
    assert libraries("checked with `scipy.stats.beta`") == {"scipy"}
    # A package name in a list of versions is not a reference computation.
    assert libraries('versions = {"numpy", "scipy"}; scipyish quantecons') == set()


def test_sections_split_validation_md_by_test_file():
    text = "# V\n## `tests/a.py`\nCantor 1994\n### `tests/cli/b.py` (CLI)\nscipy\n"
    assert sections(text) == {"tests/a.py": "\nCantor 1994\n", "tests/cli/b.py": " (CLI)\nscipy\n"}


def test_every_test_file_named_in_validation_md_exists():
    text = VALIDATION.read_text(encoding="utf-8")
    missing = sorted({p for p in TEST_PATH.findall(text) if not (ROOT / p).is_file()})
    assert missing == [], f"docs/validation.md lists test files that do not exist: {missing}"


@pytest.mark.parametrize("path", _test_files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_every_source_a_test_cites_is_listed_in_validation_md(path):
    text = path.read_text(encoding="utf-8")
    cited, used = citations(text), libraries(text)
    if not cited and not used:
        return
    name = str(path.relative_to(ROOT))
    section = sections(VALIDATION.read_text(encoding="utf-8")).get(name)
    assert section is not None, (
        f"docs/validation.md has no section for {name}, which cites "
        f"{sorted(cited | used)}; add a heading naming `{name}` with its checks"
    )
    missing = sorted((cited - citations(section)) | (used - libraries(section)))
    assert missing == [], (
        f"docs/validation.md, section `{name}`: sources cited in the test but not listed: {missing}"
    )


DOC_LINK = re.compile(r"\]\(([^)#\s]+)(?:#[^)]*)?\)")


@pytest.mark.parametrize("doc", ["index.md", "methods.md", "validation.md", "limitations.md"])
def test_relative_links_in_the_documentation_resolve(doc):
    text = (DOCS / doc).read_text(encoding="utf-8")
    broken = sorted(
        target
        for target in DOC_LINK.findall(text)
        if "://" not in target and not (DOCS / target).exists()
    )
    assert broken == [], f"docs/{doc}: links to missing files: {broken}"


def test_index_puts_the_cautions_first_and_links_every_document():
    from caredecide.cautions import CAUTION_LONG, CAUTION_SHORT

    text = (DOCS / "index.md").read_text(encoding="utf-8")
    lines = [line.removeprefix(">").strip() for line in text.splitlines()]
    body = [line for line in lines if line and not line.startswith("# ")]
    assert "research use only" in body[0].lower()
    flat = " ".join(" ".join(lines).split())  # the caution texts verbatim, lines joined
    assert CAUTION_SHORT in flat and CAUTION_LONG in flat
    linked = set(DOC_LINK.findall(text))
    unlinked = sorted(
        p.name for p in DOCS.glob("*.md") if p.name != "index.md" and p.name not in linked
    )
    assert unlinked == [], f"docs/index.md does not link {unlinked}"


def test_every_source_cited_in_the_documents_is_in_the_reference_list():
    # validation.md says "Full references are at the end of methods.md": hold it to that.
    # A citation "Surname YEAR" is listed when one reference entry names both.
    methods = (DOCS / "methods.md").read_text(encoding="utf-8")
    body, references = methods.split("\n## References\n")
    entries = re.split(r"\n- ", references)
    cited = citations(body)
    for doc in ("validation.md", "estimation.md", "limitations.md"):
        cited |= citations((DOCS / doc).read_text(encoding="utf-8"))
    missing = sorted(
        key
        for key in cited
        if not any(
            re.search(rf"\b{re.escape(key.rsplit(' ', 1)[0])}\b", entry)
            and key.rsplit(" ", 1)[1] in entry
            for entry in entries
        )
    )
    assert missing == [], f"cited but not in the references of docs/methods.md: {missing}"
