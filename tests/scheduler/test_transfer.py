"""Scene files through Redis: content-addressed, chunked, sent and fetched only when missing,
checked on arrival, cached on the worker with a size limit.

What travelled is counted with Redis's own counters (INFO commandstats and INFO stats, reset
with CONFIG RESETSTAT) and key listings (SCAN), never with the code under test. Files are
compared with hashlib (FIPS 180-4 sha256) and byte for byte.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import time
from pathlib import Path

import pytest

from lampyr.engine.shot import load_shot
from lampyr.scheduler import protocol as P
from lampyr.scheduler.transfer import Manifest, TransferError, hold, upload_shot
from lampyr.worker.cache import FileCache

STEP = 64 * 1024  # chunk size of these tests: small files span several chunks
TRI = "mtllib tri.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nusemtl m\nf 1 2 3\n"


def _noise(n: int, seed: int) -> bytes:
    """n reproducible bytes that do not repeat across chunks (so every chunk hash differs)."""
    out, i = bytearray(), 0
    while len(out) < n:
        out += hashlib.sha256(f"{seed}/{i}".encode()).digest()
        i += 1
    return bytes(out[:n])


@pytest.fixture
def scene(tiny_shot):
    """The tiny shot with a mesh whose material names three textures: one of 3 chunks and a
    bit (the last chunk short), one of exactly 2 chunks, one empty. Returns the shot path."""
    root = tiny_shot.parent
    (root / "assets" / "tex").mkdir(parents=True)
    (root / "assets" / "tri.obj").write_text(TRI)
    (root / "assets" / "tri.mtl").write_text(
        # maps lampyr sends but does not decode (the bytes are noise, not images)
        "newmtl m\nmap_Ks tex/big.png\nmap_Ns tex/even.png\nmap_Ka tex/empty.png\n")
    (root / "assets" / "tex" / "big.png").write_bytes(_noise(3 * STEP + 7, 1))
    (root / "assets" / "tex" / "even.png").write_bytes(_noise(2 * STEP, 2))
    (root / "assets" / "tex" / "empty.png").write_bytes(b"")
    tiny_shot.write_text(tiny_shot.read_text() + '\n[[object]]\nname = "tri"\n'
                         'material = "white"\nmesh = "assets/tri.obj"\n')
    return tiny_shot


SCENE_FILES = ["assets/tex/big.png", "assets/tex/empty.png", "assets/tex/even.png",
               "assets/tri.mtl", "assets/tri.obj", "tiny.toml"]


@pytest.fixture
def r(redis_url):
    import redis

    client = redis.Redis.from_url(redis_url)
    client.config_resetstat()
    return client


def calls(r, command: str) -> int:
    """How many times Redis ran `command` since the last CONFIG RESETSTAT (INFO commandstats)."""
    return int(r.info("commandstats").get(f"cmdstat_{command}", {}).get("calls", 0))


def net_in(r) -> int:
    """Bytes Redis received from clients since the last CONFIG RESETSTAT (INFO stats)."""
    return int(r.info("stats")["total_net_input_bytes"])


def blob_keys(r) -> set:
    return {k.decode() for k in r.scan_iter(match=P.key("blob", "*"), count=1000)}


def send(r, shot_path: Path):
    return upload_shot(r, load_shot(shot_path), chunk_bytes=STEP)


# ---------------------------------------------------------------------------------------------
# round trip


def test_a_scene_arrives_whole_with_files_larger_than_a_chunk(r, scene, tmp_path):
    sha, member, _ = send(r, scene)
    got = FileCache(tmp_path / "cache").materialise(r, sha)
    assert member == "tiny.toml"
    held = sorted(p.relative_to(got.path).as_posix() for p in got.path.rglob("*") if p.is_file())
    assert held == SCENE_FILES
    for rel in SCENE_FILES:
        assert (got.path / rel).read_bytes() == (scene.parent / rel).read_bytes(), rel
    assert load_shot(got.path / member).name == "tiny"


def test_a_large_file_is_stored_in_chunks_of_the_chosen_size(r, scene):
    send(r, scene)
    sizes = sorted(r.strlen(k) for k in blob_keys(r))
    # big.png: 3 full chunks + 7 bytes; even.png: 2 full chunks; the three small text files
    assert sizes.count(STEP) == 5 and 7 in sizes and max(sizes) == STEP
    assert len(sizes) == 5 + 1 + 3


def test_the_same_files_give_the_same_manifest(r, scene):
    assert send(r, scene)[0] == send(r, scene)[0]


# ---------------------------------------------------------------------------------------------
# only what is missing travels


def test_submitting_again_sends_no_chunk(r, scene):
    send(r, scene)
    keys = blob_keys(r)
    r.config_resetstat()
    send(r, scene)
    assert blob_keys(r) == keys
    assert calls(r, "set") == 1  # the manifest alone
    assert net_in(r) < STEP // 4  # EXPIREs and one small manifest, not a chunk


def test_one_changed_file_sends_exactly_its_chunks(r, scene):
    send(r, scene)
    before = blob_keys(r)
    big = scene.parent / "assets" / "tex" / "big.png"
    big.write_bytes(_noise(3 * STEP + 7, 99))
    r.config_resetstat()
    send(r, scene)
    new = blob_keys(r) - before
    want = {P.k_blob(hashlib.sha256(big.read_bytes()[i:i + STEP]).hexdigest())
            for i in range(0, big.stat().st_size, STEP)}
    assert new == want
    assert calls(r, "set") == len(want) + 1  # its 4 chunks and the new manifest
    assert big.stat().st_size < net_in(r) < big.stat().st_size + STEP // 4


def test_a_worker_fetches_only_the_changed_file(r, scene, tmp_path):
    cache = FileCache(tmp_path / "cache")
    cache.materialise(r, send(r, scene)[0])
    big = scene.parent / "assets" / "tex" / "big.png"
    big.write_bytes(_noise(3 * STEP + 7, 99))
    sha = send(r, scene)[0]
    r.config_resetstat()
    got = cache.materialise(r, sha)
    assert calls(r, "get") == 1 + 4  # the manifest and big.png's 4 chunks
    assert (got.path / "assets/tex/big.png").read_bytes() == big.read_bytes()


def test_a_scene_already_on_disk_is_not_fetched(r, scene, tmp_path):
    sha = send(r, scene)[0]
    FileCache(tmp_path / "cache").materialise(r, sha)
    r.config_resetstat()
    FileCache(tmp_path / "cache").materialise(r, sha)
    assert calls(r, "get") == 0


# ---------------------------------------------------------------------------------------------
# refused on arrival


def _tamper(r, scene, how):
    sha = send(r, scene)[0]
    big = (scene.parent / "assets" / "tex" / "big.png").read_bytes()
    key = P.k_blob(hashlib.sha256(big[STEP:2 * STEP]).hexdigest())  # its second chunk
    data = r.get(key)
    r.set(key, data[:-1] if how == "truncated" else data[:-1] + bytes([data[-1] ^ 1]))
    return sha


@pytest.mark.parametrize("how, message", [("truncated", "holds 65535 bytes, expected 65536"),
                                          ("flipped", "does not match its hash")])
def test_a_damaged_chunk_is_refused_in_one_line(r, scene, tmp_path, how, message):
    sha = _tamper(r, scene, how)
    cache = FileCache(tmp_path / "cache")
    with pytest.raises(TransferError, match=message) as err:
        cache.materialise(r, sha)
    text = str(err.value)
    assert "\n" not in text and "assets/tex/big.png: chunk 2 of 4" in text
    assert not cache.scene_dir(sha).exists()
    assert list((tmp_path / "cache" / "tmp").iterdir()) == []  # no half download left


def test_a_missing_chunk_says_to_submit_again(r, scene, tmp_path):
    sha = send(r, scene)[0]
    for k in blob_keys(r):
        r.delete(k)
    with pytest.raises(TransferError, match="is not in Redis .*submit the shot again"):
        FileCache(tmp_path / "cache").materialise(r, sha)


def _manifest(files, shot="s.toml", step=STEP) -> bytes:
    rows = [{"path": "s.toml", "size": 0, "sha256": hashlib.sha256(b"").hexdigest(),
             "chunks": []}] + files
    return json.dumps({"lampyr_scene": 1, "shot": shot, "chunk_bytes": step,
                       "files": rows}).encode()


def _row(path, size=1, chunks=None):
    h = hashlib.sha256(b"x").hexdigest()
    return {"path": path, "size": size, "sha256": h, "chunks": [h] if chunks is None else chunks}


@pytest.mark.parametrize("data, message", [
    (_manifest([_row("../evil.txt")]), "leaving the shot's folder"),
    (_manifest([_row("assets/../../evil.txt")]), "leaving the shot's folder"),
    (_manifest([_row("/etc/evil.txt")]), "absolute"),
    (_manifest([_row("C:/evil.txt")]), "absolute"),
    (_manifest([_row("a\\..\\evil.txt")]), "leaving the shot's folder"),
    (_manifest([_row("a"), _row("a/b")]), "both a file and a folder"),
    (_manifest([_row("a"), _row("./a")]), "listed twice"),
    (_manifest([_row("a", chunks=["../../etc/passwd"])]), "64 hex digits"),
    (_manifest([_row("a", size=STEP + 1)]), "1 chunks for 65537 bytes"),
    (_manifest([_row("a", size=-1, chunks=[])]), "whole number"),
    (_manifest([], shot="other.toml"), "does not hold it"),
    (_manifest([], step=1 << 40), "chunk_bytes"),
    (b"[1, 2]", "not a readable manifest"),
    (b"[" * 100_000, "not a readable manifest"),
])
def test_a_manifest_that_escapes_or_lies_is_refused(data, message):
    with pytest.raises(TransferError, match=message):
        Manifest.from_bytes(data)


def test_a_manifest_over_the_limits_is_refused():
    rows = [_row(f"f{i}") for i in range(5)]
    with pytest.raises(TransferError, match="more than 4 files"):
        Manifest.from_bytes(_manifest(rows), max_files=4)
    with pytest.raises(TransferError, match="more than 3 bytes"):
        Manifest.from_bytes(_manifest(rows), max_bytes=3)


def test_an_escaping_manifest_in_redis_writes_nothing(r, tmp_path):
    data = _manifest([_row("../evil.txt")])
    sha = hashlib.sha256(data).hexdigest()
    r.set(P.k_scene(sha), data)
    r.set(P.k_blob(hashlib.sha256(b"x").hexdigest()), b"x")
    cache = FileCache(tmp_path / "cache")
    with pytest.raises(TransferError):
        cache.materialise(r, sha)
    assert not (cache.root / "scenes" / "evil.txt").exists() and not cache.scene_dir(sha).exists()


def test_a_job_naming_no_hash_is_refused(r, tmp_path):
    with pytest.raises(TransferError, match="64 hex digits"):
        FileCache(tmp_path / "cache").materialise(r, "../../etc")


# ---------------------------------------------------------------------------------------------
# refused at submit


def test_a_link_leaving_the_shot_folder_is_refused_by_name(r, scene, tmp_path):
    outside = tmp_path / "secret.png"
    outside.write_bytes(b"not for the farm")
    tex = scene.parent / "assets" / "tex" / "even.png"
    tex.unlink()
    tex.symlink_to(outside)
    with pytest.raises(TransferError, match=r"^assets/tex/even.png: a link to .*secret.png, "
                                            "outside the shot's folder"):
        send(r, scene)
    assert r.dbsize() == 0  # refused before anything was sent


def test_a_link_inside_the_shot_folder_sends_its_target_under_its_name(r, scene, tmp_path):
    tex = scene.parent / "assets" / "tex" / "even.png"
    tex.unlink()
    tex.symlink_to(scene.parent / "assets" / "tex" / "big.png")
    got = FileCache(tmp_path / "cache").materialise(r, send(r, scene)[0])
    copy = got.path / "assets" / "tex" / "even.png"
    assert not copy.is_symlink() and copy.read_bytes() == tex.read_bytes()


def test_a_scene_over_the_size_limit_is_refused_before_sending(r, scene):
    with pytest.raises(TransferError, match="more than 100000 bytes"):
        upload_shot(r, load_shot(scene), chunk_bytes=STEP, max_bytes=100_000)
    assert r.dbsize() == 0


def test_a_scene_over_the_file_limit_is_refused_before_sending(r, scene):
    with pytest.raises(TransferError, match="more than 3 files"):
        upload_shot(r, load_shot(scene), chunk_bytes=STEP, max_files=3)
    assert r.dbsize() == 0


# ---------------------------------------------------------------------------------------------
# life of the keys


def test_every_key_expires_unless_renewed(r, scene):
    send(r, scene)
    ttls = [r.ttl(k) for k in r.scan_iter(match=P.key("*"))]
    assert ttls and all(0 < t <= P.FILE_TTL for t in ttls)


def test_hold_renews_and_puts_back_what_redis_lost(r, scene, tmp_path):
    sha = send(r, scene)[0]
    got = FileCache(tmp_path / "cache").materialise(r, sha)
    for k in blob_keys(r):
        r.expire(k, 5)
    big = (scene.parent / "assets" / "tex" / "big.png").read_bytes()
    lost = P.k_blob(hashlib.sha256(big[:STEP]).hexdigest())
    r.delete(lost)
    back = hold(r, r.get(P.k_scene(sha)), got.path)
    assert back == STEP
    assert r.get(lost) == big[:STEP]
    assert all(r.ttl(k) > 5 for k in blob_keys(r))


# ---------------------------------------------------------------------------------------------
# several processes, one cache


def _materialise(url, root, sha, barrier, out):
    import redis

    barrier.wait()
    try:
        got = FileCache(root).materialise(redis.Redis.from_url(url), sha)
        out.put(str(got.path))
    except BaseException as err:  # reported to the test
        out.put(f"error: {err!r}")


def test_two_processes_fetching_at_once_make_one_intact_copy(r, redis_url, scene, tmp_path):
    sha = send(r, scene)[0]
    r.config_resetstat()
    ctx = multiprocessing.get_context("spawn")
    barrier, out = ctx.Barrier(2), ctx.Queue()
    procs = [ctx.Process(target=_materialise, args=(redis_url, tmp_path / "cache", sha,
                                                    barrier, out)) for _ in range(2)]
    for p in procs:
        p.start()
    paths = [out.get(timeout=120) for _ in procs]
    for p in procs:
        p.join(30)
    assert paths[0] == paths[1] and not paths[0].startswith("error")
    for rel in SCENE_FILES:
        assert (Path(paths[0]) / rel).read_bytes() == (scene.parent / rel).read_bytes(), rel
    objects = [p for p in (tmp_path / "cache" / "objects").rglob("*") if p.is_file()]
    assert len(objects) == len(SCENE_FILES)
    # every chunk fetched once (big 4, even 2, three text files 1 each; the empty file has
    # none), and the manifest by one or both (the second may find the folder already made)
    assert calls(r, "get") in (9 + 1, 9 + 2)
    assert [p.name for p in (tmp_path / "cache" / "scenes").iterdir()] == [sha]


# ---------------------------------------------------------------------------------------------
# the cache's size limit


def _age(path: Path, seconds: float) -> None:
    for p in [path, *path.rglob("*")]:
        os.utime(p, (time.time() - seconds, time.time() - seconds), follow_symlinks=False)


def test_the_cache_drops_the_least_recently_used_scene_past_its_limit(r, scene, tmp_path):
    cache = FileCache(tmp_path / "cache", limit=int(6.5 * STEP))
    first = send(r, scene)[0]
    cache.materialise(r, first)
    _age(cache.root, 2 * 3600)  # used two hours ago
    big = scene.parent / "assets" / "tex" / "big.png"
    big.write_bytes(_noise(3 * STEP + 7, 99))
    second = send(r, scene)[0]
    cache.materialise(r, second)  # 5 + 3 + 2 chunks' worth: over the limit
    assert not cache.scene_dir(first).exists() and cache.scene_dir(second).is_dir()
    assert cache.size() <= cache.limit
    for rel in SCENE_FILES:
        assert (cache.scene_dir(second) / rel).read_bytes() == (scene.parent / rel).read_bytes()


def test_a_scene_used_within_the_hour_is_kept_even_past_the_limit(r, scene, tmp_path):
    cache = FileCache(tmp_path / "cache", limit=STEP)
    first = send(r, scene)[0]
    cache.materialise(r, first)
    (scene.parent / "assets" / "tex" / "big.png").write_bytes(_noise(3 * STEP + 7, 99))
    second = send(r, scene)[0]
    cache.materialise(r, second)
    assert cache.scene_dir(first).is_dir() and cache.scene_dir(second).is_dir()


# ---------------------------------------------------------------------------------------------
# the head keeps the files of unfinished jobs


@pytest.fixture
def head(redis_url, tmp_path, monkeypatch):
    from lampyr.scheduler.head import Head

    monkeypatch.setenv("LAMPYR_CACHE", str(tmp_path / "head-cache"))
    h = Head(tmp_path / "state", redis_url, lease_seconds=5)
    h.start()
    return h


def _submit(head, shot):
    from lampyr.scheduler.submit import submit_request

    job = submit_request(head.r, shot, {}, None, tile_size=8, batch_samples=3)
    head.take_commands()
    return job


def test_the_head_puts_back_the_files_redis_lost_before_queueing(head, scene):
    _submit(head, scene)
    head.dispatch()  # the files were renewed just now
    keys = {k: head.r.get(k) for k in head.r.scan_iter(match=P.key("blob", "*"))}
    head.r.flushdb()  # Redis restarted without its data
    head.reconcile()
    assert head.dispatch() > 0
    assert {k: head.r.get(k) for k in head.r.scan_iter(match=P.key("blob", "*"))} == keys


@pytest.mark.parametrize("cancelled", [False, True])
def test_the_head_renews_the_files_of_unfinished_jobs_only(head, scene, cancelled):
    job = _submit(head, scene)
    if cancelled:
        head.command("cancel", job=job)
    for k in head.r.scan_iter(match=P.key("*")):
        if k.startswith(P.key("blob").encode()) or k.startswith(P.key("scene").encode()):
            head.r.expire(k, 100)
    head.scenes.held.clear()
    head.hold_files(every=0)
    ttls = [head.r.ttl(k) for k in head.r.scan_iter(match=P.key("blob", "*"))]
    assert ttls and all(t <= 100 if cancelled else t > 100 for t in ttls)
