"""lampyr reads no test switch: test-only behaviour is injected by the tests (tests/harness.py),
never read by the product from its environment (docs/farm.md, "Test-only behaviour")."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("engine", "scheduler", "worker", "webui", "lampyr")
SWITCH = re.compile(r"LAMPYR_TEST", re.IGNORECASE)


def product_files() -> list[Path]:
    return [p for pkg in PACKAGES for p in sorted((ROOT / pkg).rglob("*"))
            if p.is_file() and p.suffix in (".py", ".html", ".js", ".toml", ".cfg", ".sh")]


def test_the_product_packages_are_all_looked_at():
    files = product_files()
    # every package has Python files to read; an empty list would make the next test vacuous
    assert all(any(p.parts[len(ROOT.parts)] == pkg and p.suffix == ".py" for p in files)
               for pkg in PACKAGES)


def test_no_product_file_mentions_a_test_switch():
    hits = [f"{p.relative_to(ROOT)}:{i}: {line.strip()}"
            for p in product_files()
            for i, line in enumerate(p.read_text(errors="replace").splitlines(), 1)
            if SWITCH.search(line)]
    assert not hits, "product code reads test switches:\n" + "\n".join(hits)


def test_the_check_finds_a_switch_where_there_is_one():
    # the pattern itself, against a line as the removed hooks read them
    assert SWITCH.search('delay = os.environ.get("LAMPYR_TEST_CHUNK_DELAY")')
