"""Every concrete `lampyr …` command the README shows is one the command line accepts, and the
README's farm block runs as written.

Commands in code blocks and in inline code (outside the command table, whose rows are syntax
summaries with `[…]`) are parsed by click exactly as the shell would hand them over. The farm
block (`lampyr head --state …`, `lampyr worker`, `lampyr submit …`, `lampyr status JOB --json`)
is run, line by line, with real processes; the other shell blocks install packages or run the
whole suite, and are named in NOT_RUN with the reason.
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
    # `lampyr render` alone in a sentence names the command; only longer ones are examples,
    # and those that run as they stand (no argument needed: they find the farm by themselves)
    alone = {"lampyr worker", "lampyr doctor", "lampyr farm", "lampyr status"}
    found += [c for c in re.findall(r"`(lampyr [^`]+)`", prose)
              if (len(c.split()) > 2 or c in alone) and "…" not in c and "[" not in c]
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


# ---------------------------------------------------------------------------------------------
# the README's shell blocks, run as written


def shell_blocks() -> list[str]:
    return re.findall(r"```(?:sh|bash)\n(.*?)```", README.read_text(), re.S)


def block_commands(block: str) -> list[str]:
    return [line.split("#", 1)[0].strip() for line in block.splitlines()
            if line.split("#", 1)[0].strip()]


# Blocks that are not run here, and why: installing lampyr and its test extras into the test's
# own environment, or running the whole suite from inside it, is not something a test can do.
NOT_RUN = {
    "python -m pip install . && lampyr render examples/courtyard/courtyard.toml --out renders/courtyard":
        "installs lampyr and renders the 48-frame demo (minutes on two cores)",
    "python -m pip install -e \".[test]\" && sh tests/install-browser.sh && sh "
    "tests/install-gltf-validator.sh && python -m pytest": "installs packages and runs the whole suite",
}


def test_every_shell_block_is_run_or_named_as_not_run():
    farm_blocks = [b for b in shell_blocks() if "lampyr head" in b]
    others = [" ".join(block_commands(b)) for b in shell_blocks() if "lampyr head" not in b]
    assert len(farm_blocks) == 1
    assert sorted(others) == sorted(NOT_RUN)


def _wait(cond, timeout, what):
    import time

    give_up_at = time.monotonic() + timeout
    while not (value := cond()):
        if time.monotonic() > give_up_at:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.2)
    return value


def test_the_farm_block_runs_as_written(tmp_path, tiny_shot, compiled_kernels):
    """The farm block on one machine, every line as the README has it, with its placeholders
    filled in: /srv/lampyr and /srv/frames are scratch folders, courtyard.toml is a small shot
    of the tests (the demo's 48 frames take minutes), JOB the id `submit` printed. The commands
    and the worker find the head with no option, as the README says they do on its machine;
    the user's config folder is a scratch one (XDG_CONFIG_HOME), so the test's are its own."""
    import json
    import os
    import shutil
    import signal
    import subprocess
    import sys

    (block,) = [b for b in shell_blocks() if "lampyr head" in b]
    shot = tmp_path / "courtyard.toml"
    shutil.copy(tiny_shot, shot)
    fill = {"/srv/lampyr": str(tmp_path / "state"), "/srv/frames": str(tmp_path / "frames"),
            "courtyard.toml": str(shot)}
    env = dict(os.environ, XDG_CONFIG_HOME=str(tmp_path / "config"), PYTHONUNBUFFERED="1")
    for k in ("LAMPYR_HEAD", "LAMPYR_STATE"):
        env.pop(k, None)
    background, job, status = [], None, None

    def words(command):
        out = []
        for w in shlex.split(command):
            w = fill.get(w, w)
            out.append(job if w == "JOB" else w)
        assert out[0] == "lampyr"
        return [sys.executable, "-m", "lampyr.cli", *out[1:]]

    try:
        for command in block_commands(block):
            verb = shlex.split(command)[1]
            if verb in ("head", "worker"):  # they run until stopped
                log = tmp_path / f"{verb}.log"
                background.append(subprocess.Popen(words(command), env=env, cwd=tmp_path,
                                                   stdout=open(log, "wb"),
                                                   stderr=subprocess.STDOUT,
                                                   start_new_session=True))
                if verb == "head":
                    _wait(lambda: "Workers join with:" in log.read_text(errors="replace")
                          or background[0].poll() is not None, 60, "the head")
                    assert background[0].poll() is None, log.read_text()
                continue
            res = subprocess.run(words(command), env=env, cwd=tmp_path, capture_output=True,
                                 text=True, timeout=300)
            assert res.returncode == 0, f"`{command}`: {res.stderr}"
            if verb == "submit":
                job = res.stdout.strip().splitlines()[-1]
            if verb == "status":
                status = json.loads(res.stdout)
        # what the README's comment shows, for the job submitted
        assert {"state", "frames", "frames_done"} <= set(status)
        assert status["job"] == job and status["frames"] == 2
        # and the farm renders it: the worker found the head by itself too
        status_line = words("lampyr status JOB --json")

        def done():
            out = subprocess.run(status_line, env=env, capture_output=True, text=True, timeout=60)
            st = json.loads(out.stdout)
            return st if st["state"] in ("done", "failed") else None

        final = _wait(done, 600, "the job")
        assert final["state"] == "done", final
        assert sorted(p.name for p in (tmp_path / "frames").glob("*.exr")) == [
            "tiny.0001.exr", "tiny.0002.exr"]
    finally:
        for proc in reversed(background):
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGTERM)
                try:
                    proc.wait(60)
                except subprocess.TimeoutExpired:
                    os.killpg(proc.pid, signal.SIGKILL)
                    proc.wait()
