"""Every concrete `lampyr …` command the README shows is one the command line accepts.

Commands in code blocks and in inline code (outside the command table, whose rows are syntax
summaries with `[…]`) are parsed by click exactly as the shell would hand them over, without
running them; what they do is covered by the tests of each command.
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import click
import pytest

from lampyr.cli import cli

README = Path(__file__).resolve().parents[2] / "README.md"


def shown_commands() -> list[str]:
    text = README.read_text()
    found = []
    for block in re.findall(r"```(?:sh|bash)?\n(.*?)```", text, re.S):
        for line in block.splitlines():
            line = line.split("#", 1)[0].strip()
            found += [c.strip() for c in line.split("&&") if c.strip().startswith("lampyr ")]
    prose = re.sub(r"```.*?```", "", text, flags=re.S)
    prose = "\n".join(l for l in prose.splitlines() if not l.lstrip().startswith("|"))
    # `lampyr render` alone in a sentence names the command; only longer ones are examples
    found += [c for c in re.findall(r"`(lampyr [^`]+)`", prose)
              if len(c.split()) > 2 and "…" not in c and "[" not in c]
    return sorted(set(found))


COMMANDS = shown_commands()


def test_the_readme_shows_the_core_commands():
    verbs = {shlex.split(c)[1] for c in COMMANDS}
    assert {"render", "head", "worker", "submit", "status", "doctor"} <= verbs


@pytest.mark.parametrize("command", COMMANDS)
def test_readme_command_parses(command):
    words = shlex.split(command)[1:]
    group_ctx = cli.make_context("lampyr", list(words), resilient_parsing=True)
    name, sub, rest = cli.resolve_command(group_ctx, list(words))
    try:
        sub.make_context(name, rest, parent=group_ctx)
    except click.UsageError as err:
        pytest.fail(f"README shows `{command}`: {err.format_message()}")
