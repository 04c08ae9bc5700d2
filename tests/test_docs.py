"""Citations in code and tests point at documents that are in the repository, and at rules those
documents state (docs/design.md: its numbered invariants).

Source of truth here is the repository itself: the files on disk and the numbered list under
"## Invariants" in docs/design.md. Every check collects all offenders and names them by file and
line, so a failure says exactly which comment to fix.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DESIGN = ROOT / "docs" / "design.md"

# files that hold code, tests, scripts, templates and deployment files (not the documents)
SUFFIXES = {".py", ".js", ".html", ".css", ".sh", ".toml", ".cfg", ".ini", ".service",
            ".plist", ".conf", ".yml", ".yaml", ".env", ".txt"}
SKIP_DIRS = {".git", "node_modules", "__pycache__", ".pytest_cache", "build", "dist", ".venv",
             "venv", ".mypy_cache", ".ruff_cache", "renders"}

CITATION = re.compile(r"docs/design\.md, invariants? (\d+(?:(?:, | and | or )\d+)*)")
ANY_INVARIANT = re.compile(r"\binvariants? (\d+)")
MARKDOWN = re.compile(r"(?<![\w/.-])((?:[\w.-]+/)*[\w-][\w.-]*\.md)\b")
NOTES = re.compile(r"\b[A-Z][A-Z_]+-NOTES\b")


def code_files() -> list[Path]:
    out = []
    for path in ROOT.rglob("*"):
        rel = path.relative_to(ROOT)
        if any(part in SKIP_DIRS or part.endswith(".egg-info") for part in rel.parts[:-1]):
            continue
        if path.is_file() and (path.suffix in SUFFIXES or rel.parts[0] == ".ci"):
            out.append(path)
    return sorted(out)


def lines_of(path: Path):
    try:
        text = path.read_text(encoding="utf-8")
    except (UnicodeDecodeError, OSError):
        return
    for no, line in enumerate(text.splitlines(), 1):
        yield no, line


def design_invariants() -> list[int]:
    """The numbers of the items `N. **…**` in the section "## Invariants" of docs/design.md."""
    text = DESIGN.read_text(encoding="utf-8")
    section = text.split("\n## Invariants\n", 1)[1].split("\n## ", 1)[0]
    return [int(m.group(1)) for m in re.finditer(r"^(\d+)\. \*\*", section, re.M)]


def test_the_design_numbers_its_invariants_one_after_another():
    numbers = design_invariants()
    assert len(numbers) >= 10, f"docs/design.md lists only {len(numbers)} invariants"
    assert numbers == list(range(1, len(numbers) + 1)), numbers


def test_every_invariant_cited_in_code_and_tests_exists():
    known = set(design_invariants())
    cited, wrong = 0, []
    for path in code_files():
        for no, line in lines_of(path):
            for m in CITATION.finditer(line):
                for n in map(int, re.findall(r"\d+", m.group(1))):
                    cited += 1
                    if n not in known:
                        wrong.append(f"{path.relative_to(ROOT)}:{no}: invariant {n}")
    assert cited > 0, "no code or test cites docs/design.md at all"
    assert not wrong, "cited invariants that docs/design.md does not have:\n" + "\n".join(wrong)


def test_every_invariant_number_names_the_design_document():
    # an invariant's number alone, or after another document's name, points nowhere a reader
    # can follow
    bare = []
    for path in code_files():
        for no, line in lines_of(path):
            good = {m.start(1) for m in CITATION.finditer(line)}
            for m in ANY_INVARIANT.finditer(line):
                if m.start(1) not in good:
                    bare.append(f"{path.relative_to(ROOT)}:{no}: {line.strip()[:100]}")
    assert not bare, ('write "docs/design.md, invariant N":\n' + "\n".join(bare))


def _exists(name: str, citing: Path) -> bool:
    if "/" in name:
        return (ROOT / name).is_file() or (citing.parent / name).is_file()
    return any((folder / name).is_file() for folder in (ROOT, ROOT / "docs", citing.parent))


def test_every_document_cited_in_code_and_tests_exists():
    missing = []
    for path in code_files():
        for no, line in lines_of(path):
            for m in MARKDOWN.finditer(line):
                if not _exists(m.group(1), path):
                    missing.append(f"{path.relative_to(ROOT)}:{no}: {m.group(1)}")
            for m in NOTES.finditer(line):
                if not any(ROOT.rglob(m.group(0) + "*")):
                    missing.append(f"{path.relative_to(ROOT)}:{no}: {m.group(0)}")
    assert not missing, "documents cited but not in the repository:\n" + "\n".join(missing)


def test_the_checks_above_catch_what_they_look_for(tmp_path):
    # the patterns themselves, on lines written to fail
    assert [m.group(1) for m in CITATION.finditer("x (docs/design.md, invariants 1 and 9)")] == \
        ["1 and 9"]
    assert ANY_INVARIANT.search("# same sums (invariant" + " 2)")
    absent = "docs/nowhere" + ".md"  # split, so that this file does not cite it
    assert MARKDOWN.search("see " + absent).group(1) == absent
    assert not _exists(absent, tmp_path / "x.py")
    assert _exists("docs/design.md", tmp_path / "x.py") and _exists("farm.md", tmp_path / "x.py")


FORBIDDEN_IN_ENGINE = {"celery", "kombu", "redis", "flask", "werkzeug", "waitress"}
FARM_PACKAGES = {"scheduler", "worker", "webui"}


@pytest.mark.parametrize("path", sorted((ROOT / "engine").glob("*.py")), ids=lambda p: p.name)
def test_the_engine_imports_nothing_of_the_farm(path):
    # docs/design.md, invariant 14: the engine stands alone
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level >= 2 and base.split(".")[0] in FARM_PACKAGES:
                found.append(f"line {node.lineno}: {'.' * node.level}{base}")
            names = [base] if node.level == 0 else []
        else:
            continue
        for name in names:
            parts = name.split(".")
            if parts[0] in FORBIDDEN_IN_ENGINE or (parts[0] == "lampyr" and len(parts) > 1
                                                    and parts[1] in FARM_PACKAGES):
                found.append(f"line {node.lineno}: {name}")
    assert not found, f"engine/{path.name} imports " + ", ".join(found)
