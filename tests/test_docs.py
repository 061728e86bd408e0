"""The project's own documents hold together: what they cite exists in the repository.

Code and tests cite formulas as "docs/methods.md, section <heading>"; ``docs/faults.md``
backs each bad input and fault with ``tests/<file>.py::<test>``. A citation of a section
or a test that is not there is a claim nobody can check, so these tests read the files
as text (Python's ``ast`` for the test names) and compare.
"""

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SOURCES = [*sorted((ROOT / "despeck").rglob("*.py")), *sorted((ROOT / "tests").glob("*.py")),
           *sorted((ROOT / "scripts").glob("*.py")), *sorted((ROOT / "benchmarks").glob("*.py")),
           *sorted((ROOT / "docs").glob("*.md")), ROOT / "README.md", ROOT / "DEVELOPERS.md"]
SOURCES = [path for path in SOURCES if path != Path(__file__).resolve()]  # this file names the patterns


def _flat(text):
    """Text with line breaks (and the comment marks that start the next line) turned into spaces."""
    return re.sub(r"\s*\n\s*(?:#:?\s*)?", " ", text)


def _headings(path):
    return {line[3:].strip() for line in path.read_text().splitlines() if line.startswith("## ")}


def test_methods_citations_name_sections_that_exist():
    sections = _headings(ROOT / "docs" / "methods.md")
    cited = {}
    for path in SOURCES:
        for name in re.findall(r"docs/methods\.md, section ([^).;:,\"`*]+)", _flat(path.read_text())):
            cited.setdefault(name.strip(), []).append(path.relative_to(ROOT).as_posix())
    assert cited, "no citation of docs/methods.md found: the pattern no longer matches how code cites it"
    missing = {name: where for name, where in cited.items() if name not in sections}
    assert not missing, f"cited sections that docs/methods.md does not have: {missing}"


def test_no_citation_of_a_methods_file_outside_the_repository():
    # Code and tests used to cite a methods sheet by section that is not in the repository;
    # only docs/methods.md may be cited that way.
    offenders = [path.relative_to(ROOT).as_posix() for path in SOURCES
                 if re.search(r"(?<!docs/)METHODS\.md,? section", path.read_text())]
    assert offenders == []


def _test_functions(path):
    tree = ast.parse(path.read_text())
    return {node.name for node in tree.body if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))}


def test_every_row_of_the_faults_table_names_tests_that_exist():
    rows = [line for line in (ROOT / "docs" / "faults.md").read_text().splitlines()
            if line.startswith("| ") and not line.startswith("| bad input") and not line.startswith("| **")]
    assert len(rows) >= 40
    for row in rows:
        refs = re.findall(r"tests/(test_\w+\.py)::(test_\w+)", row.split(" | ")[-1])
        assert refs, f"a row of docs/faults.md names no test: {row[:80]}"
        for file, name in refs:
            path = ROOT / "tests" / file
            assert path.is_file(), f"docs/faults.md names {file}, which does not exist"
            assert name in _test_functions(path), f"docs/faults.md names {file}::{name}, which does not exist"


def test_readme_links_the_faults_and_methods_pages():
    readme = (ROOT / "README.md").read_text()
    assert "docs/faults.md" in readme and "docs/methods.md" in readme
