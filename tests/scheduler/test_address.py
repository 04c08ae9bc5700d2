"""Finding the farm (scheduler/address.py): the order of the places an address comes from, the
files' modes, and `lampyr farm` reading the address from standard input, never argv."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from lampyr.scheduler import address as A

W = "redis://worker:w@10.0.0.5:6390/0"
C = "redis://artist:c@10.0.0.5:6390/0"


@pytest.fixture
def home(tmp_path, monkeypatch):
    """A user of their own: config and state folders in tmp_path, no LAMPYR_* set."""
    for k in ("LAMPYR_HEAD", "LAMPYR_STATE"):
        monkeypatch.delenv(k, raising=False)
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "config"))
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    return tmp_path


def test_nothing_found_is_one_line_naming_the_ways(home):
    with pytest.raises(A.NoFarm) as err:
        A.find()
    assert "LAMPYR_HEAD" in str(err.value) and "lampyr farm" in str(err.value)
    assert "\n" not in str(err.value)


def test_a_head_on_this_machine_is_found_whatever_its_state(home):
    A.record_head(home / "somewhere" / "else", C, W)
    assert A.find() == C
    assert A.find(role=A.WORKERS) == W
    for path in (A.local_head_file(), A.state_file(home / "somewhere" / "else")):
        assert path.stat().st_mode & 0o777 == 0o600
    assert A.config_folder().stat().st_mode & 0o777 == 0o700
    assert json.loads(A.local_head_file().read_text())["state"].endswith("else")


def test_the_order_head_env_state_saved_local(home, monkeypatch):
    A.record_head(home / "s1", "redis://artist:local@h:1/0", W)
    A.save_farm("redis://artist:saved@h:1/0")
    assert A.find() == "redis://artist:saved@h:1/0"  # saved beats the local head
    A.record_head(home / "s2", "redis://artist:state@h:1/0", W)
    assert A.find(state=home / "s2") == "redis://artist:state@h:1/0"  # --state beats saved
    monkeypatch.setenv("LAMPYR_HEAD", "redis://artist:env@h:1/0")
    assert A.find(state=home / "s2") == "redis://artist:env@h:1/0"  # the environment beats it
    assert A.find("redis://artist:given@h:1/0") == "redis://artist:given@h:1/0"
    monkeypatch.delenv("LAMPYR_HEAD")
    assert A.forget_farm()
    assert A.find() == "redis://artist:state@h:1/0"  # the head last started here


def test_a_state_folder_no_head_used_is_named(home):
    with pytest.raises(A.NoFarm, match="no head has run with state folder"):
        A.find(state=home / "nothing")


@pytest.mark.parametrize("bad", ["10.0.0.5:6390", "http://x", ""])
def test_an_address_that_is_not_one_is_refused(home, bad):
    from lampyr.errors import UsageError

    with pytest.raises(UsageError, match="expected a farm address like redis://"):
        A.save_farm(bad)


def test_lampyr_farm_reads_standard_input_and_says_it_back_redacted(home):
    env = {"XDG_CONFIG_HOME": str(home / "config"), "PATH": "/usr/bin:/bin"}
    res = subprocess.run([sys.executable, "-m", "lampyr.cli", "farm"], input=C + "\n",
                         capture_output=True, text=True, env=env, timeout=60)
    assert res.returncode == 0, res.stderr
    assert ":c@" not in res.stdout and "redis://***@10.0.0.5:6390/0" in res.stdout
    assert A.saved_file().read_text().strip() == C
    assert A.saved_file().stat().st_mode & 0o777 == 0o600
    res = subprocess.run([sys.executable, "-m", "lampyr.cli", "farm", "--show"],
                         capture_output=True, text=True, env=env, timeout=60)
    assert "redis://***@10.0.0.5:6390/0" in res.stdout and "lampyr farm" in res.stdout
