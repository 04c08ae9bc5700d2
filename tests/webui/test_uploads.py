"""Submitting a shot by upload: a shot file plus an archive of its assets, checked like a
scene's files."""

from __future__ import annotations

import io
import tarfile
import zipfile

import pytest

from tests.conftest import TINY_SHOT

from .conftest import token_of

# the tiny shot with its floor as a mesh from the archive instead of a sphere
MESH_SHOT = TINY_SHOT.replace(
    'sphere = { center = [0.0, -100.0, 0.0], radius = 100.0 }', 'mesh = "assets/floor.obj"')
FLOOR_OBJ = b"v -5 0 -5\nv 5 0 -5\nv 5 0 5\nv -5 0 5\nf 1 3 2\nf 1 4 3\n"


def zip_of(files: dict) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        for name, body in files.items():
            z.writestr(name, body)
    return buf.getvalue()


def encrypted_zip_of(files: dict) -> bytes:
    """A zip whose members are marked encrypted (general purpose flag bit 0, PKWARE APPNOTE
    4.4.4, from memory): zipfile cannot write one, so the flag is set in the bytes."""
    raw = bytearray(zip_of(files))
    raw[raw.index(b"PK\x01\x02") + 8] |= 1  # central directory header
    raw[raw.index(b"PK\x03\x04") + 6] |= 1  # local file header
    return bytes(raw)


def tgz_of(files: dict, links: dict | None = None, folders: tuple = ()) -> bytes:
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w:gz") as tar:
        for name in folders:
            info = tarfile.TarInfo(name)
            info.type = tarfile.DIRTYPE
            tar.addfile(info)
        for name, body in files.items():
            info = tarfile.TarInfo(name)
            info.size = len(body)
            tar.addfile(info, io.BytesIO(body))
        for name, target in (links or {}).items():
            info = tarfile.TarInfo(name)
            info.type = tarfile.SYMTYPE
            info.linkname = target
            tar.addfile(info)
    return buf.getvalue()


def upload(user, shot=MESH_SHOT.encode(), shot_name="tiny.toml", archive=None,
           archive_name="assets.zip", **fields):
    data = {"shot": (io.BytesIO(shot), shot_name), "token": user.token, **fields}
    if archive is not None:
        data["assets"] = (io.BytesIO(archive), archive_name)
    return user.post("/api/submit", data=data, content_type="multipart/form-data")


@pytest.mark.parametrize("archive,name", [
    (zip_of({"assets/floor.obj": FLOOR_OBJ}), "assets.zip"),
    (tgz_of({"assets/floor.obj": FLOOR_OBJ}), "assets.tar.gz"),
    (zip_of({"courtyard/assets/floor.obj": FLOOR_OBJ}), "folder.zip"),  # the shot's own folder
    # what `tar -C folder -czf a.tgz .` makes: a "./" entry first, then "./assets/…"
    (tgz_of({"./assets/floor.obj": FLOOR_OBJ}, folders=("./", "./assets")), "dot.tgz"),
], ids=["zip", "tar.gz", "folder-zip", "dot-tgz"])
def test_an_uploaded_shot_with_its_assets_becomes_a_job(user, head, archive, name):
    resp = upload(user, archive=archive, archive_name=name)
    assert resp.status_code == 202, resp.get_json()
    job = resp.get_json()["job"]
    head.take_commands()
    assert job in head.jobs and head.jobs[job].rec.name == "tiny"


def test_the_upload_s_overrides_reach_the_job(user, head):
    resp = upload(user, archive=zip_of({"assets/floor.obj": FLOOR_OBJ}), frames="2-2",
                  width="8", height="6", samples="3", priority="4", tile="8")
    job = resp.get_json()["job"]
    head.take_commands()
    run = head.jobs[job]
    assert (run.frames, run.shot.width, run.shot.height, run.rec.samples, run.rec.priority,
            run.rec.tile_size) == ([2], 8, 6, 3, 4, 8)


def test_nothing_of_the_upload_is_left_behind(user, head, state):
    upload(user, archive=zip_of({"assets/floor.obj": FLOOR_OBJ}))
    assert list((state / "web" / "uploads").iterdir()) == []


@pytest.mark.parametrize("archive,name,words", [
    (zip_of({"../escape.obj": FLOOR_OBJ}), "a.zip", "paths leaving the shot's folder are refused"),
    (zip_of({"/etc/x.obj": FLOOR_OBJ}), "a.zip", "absolute paths are refused"),
    (tgz_of({"assets/../../x.obj": FLOOR_OBJ}), "a.tar.gz", "paths leaving the shot's folder"),
    (tgz_of({}, links={"assets/floor.obj": "/etc/passwd"}), "a.tar.gz", "only regular files"),
    (b"this is not an archive", "a.zip", "not a readable .zip archive"),
    (b"\x1f\x8b broken gzip", "a.tgz", "not a readable .tgz archive"),
    (zip_of({"assets/floor.obj": FLOOR_OBJ}), "a.rar", "expected a .zip, .tar.gz"),
    (zip_of({"assets/floor.obj": FLOOR_OBJ, "assets/floor.obj/x": b"x"}), "a.zip",
     "is both a file and a folder"),
    (tgz_of({"assets/x/y": b"y", "assets/x": b"x"}), "a.tgz", "is both a file and a folder"),
    (encrypted_zip_of({"assets/floor.obj": FLOOR_OBJ}), "a.zip", "not a readable .zip archive"),
], ids=lambda v: v if isinstance(v, str) else "archive")
def test_a_bad_archive_is_refused_with_a_clear_message(user, head, archive, name, words):
    resp = upload(user, archive=archive, archive_name=name)
    assert resp.status_code == 400
    err = resp.get_json()["error"]
    assert err.startswith("assets:") and words in err
    head.take_commands()
    assert head.jobs == {}


def test_an_archive_is_checked_whole_before_anything_is_written(tmp_path):
    from lampyr.scheduler.uploads import UploadError, unpack_archive

    archive = zip_of({"assets/floor.obj": FLOOR_OBJ, "assets/../../x.obj": FLOOR_OBJ})
    with pytest.raises(UploadError):
        unpack_archive(archive, "a.zip", tmp_path)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("archive,name", [
    (zip_of({f"folder{i}/": b"" for i in range(50)}), "a.zip"),
    (tgz_of({}, folders=tuple(f"folder{i}" for i in range(50))), "a.tgz")], ids=["zip", "tgz"])
def test_an_archive_of_too_many_entries_is_refused_before_it_is_read_whole(tmp_path, archive,
                                                                           name):
    from lampyr.scheduler.uploads import UploadError, unpack_archive

    with pytest.raises(UploadError, match="more than 20 entries"):
        unpack_archive(archive, name, tmp_path, max_members=10)


def test_a_shot_file_larger_than_a_shot_is_refused_naming_the_field(user, monkeypatch):
    from lampyr.scheduler import uploads

    monkeypatch.setattr(uploads, "MAX_SHOT_BYTES", 1024)
    resp = upload(user, shot=MESH_SHOT.encode() + b"#" * 2048,
                  archive=zip_of({"assets/floor.obj": FLOOR_OBJ}))
    assert resp.status_code == 400 and resp.get_json()["error"].startswith("shot: larger than")


def test_a_shot_whose_assets_are_missing_is_refused_naming_the_key(user):
    resp = upload(user)
    assert resp.status_code == 400
    err = resp.get_json()["error"]
    assert err.startswith("tiny.toml: object[floor].mesh:") and "/state/" not in err


def test_a_shot_with_a_mistake_is_refused_naming_the_key(user):
    resp = upload(user, shot=TINY_SHOT.replace("fov = 40.0", "fov = 0").encode())
    assert resp.status_code == 400
    assert resp.get_json()["error"].startswith("tiny.toml: camera.fov: expected degrees")


@pytest.mark.parametrize("name", ["shot.txt", "..toml", "", "evil\x00.toml"])
def test_a_shot_file_that_is_not_a_toml_file_is_refused(user, name):
    resp = upload(user, shot_name=name)
    assert resp.status_code == 400 and resp.get_json()["error"].startswith("shot:")


def test_a_shot_file_name_with_folders_is_taken_by_its_last_part(user, head):
    resp = upload(user, shot_name="../../etc/tiny.toml",
                  archive=zip_of({"assets/floor.obj": FLOOR_OBJ}))
    assert resp.status_code == 202


def test_a_binary_shot_file_is_refused(user):
    resp = upload(user, shot=b"\xff\xfe\x00binary")
    assert resp.status_code == 400 and "TOML text file" in resp.get_json()["error"]


def test_an_upload_over_the_limit_is_refused_with_the_limit(user):
    resp = upload(user, archive=b"\0" * (3 * 1024 * 1024), archive_name="big.zip")
    assert resp.status_code == 413
    assert resp.get_json()["error"] == ("upload: larger than this farm's limit of 2 MiB "
                                        "(shot file and assets archive together)")


def test_an_upload_without_a_shot_is_refused(user):
    resp = user.post("/api/submit", data={"token": token_of(user)},
                     content_type="multipart/form-data")
    assert resp.status_code == 400 and resp.get_json()["error"].startswith("shot:")


@pytest.mark.parametrize("field,value", [("frames", "one-two"), ("width", "0"),
                                         ("samples", "lots"), ("priority", "9999"),
                                         ("tile", "4")])
def test_a_bad_override_is_refused_naming_the_field(user, field, value):
    resp = upload(user, archive=zip_of({"assets/floor.obj": FLOOR_OBJ}), **{field: value})
    assert resp.status_code == 400 and resp.get_json()["error"].startswith(field + ":")


@pytest.mark.parametrize("field,value,words", [
    ("frames", "5-3", "first <= last"), ("frames", "1-99999999", "a frame number between")])
def test_an_override_the_shot_refuses_is_refused_naming_the_field_not_the_head_s_folder(
        user, field, value, words):
    resp = upload(user, archive=zip_of({"assets/floor.obj": FLOOR_OBJ}), **{field: value})
    err = resp.get_json()["error"]
    assert resp.status_code == 400 and err.startswith(field + ": ") and words in err
    assert "uploads" not in err and "/state/" not in err


def test_an_upload_with_a_ready_by_time_gets_that_time(user, head):
    import time

    until = time.strftime("%Y-%m-%dT%H:%M", time.localtime(time.time() + 3 * 3600))
    resp = upload(user, archive=zip_of({"assets/floor.obj": FLOOR_OBJ}), until=until)
    job = resp.get_json()["job"]
    head.take_commands()
    want = time.mktime(time.strptime(until, "%Y-%m-%dT%H:%M"))  # local time, like --until
    assert head.jobs[job].rec.ready_by == pytest.approx(want)


def test_a_ready_by_time_in_the_past_is_refused_naming_the_field(user):
    resp = upload(user, archive=zip_of({"assets/floor.obj": FLOOR_OBJ}), until="2001-01-01T07:00")
    assert resp.status_code == 400 and resp.get_json()["error"].startswith("until:")


# --- every 413 names the limit it hit; deep nesting is a 400 (issue 13) -----------------------

def multipart(parts: list[tuple[str, bytes, str | None]], boundary: str = "B0und") -> bytes:
    out = b""
    for name, body, filename in parts:
        disp = f'form-data; name="{name}"' + (f'; filename="{filename}"' if filename else "")
        out += f"--{boundary}\r\nContent-Disposition: {disp}\r\n\r\n".encode() + body + b"\r\n"
    return out + f"--{boundary}--\r\n".encode()


def post_raw(user, body: bytes, boundary: str = "B0und"):
    return user.post("/api/submit", data=body, headers={"X-Lampyr-Token": user.token},
                     content_type=f"multipart/form-data; boundary={boundary}")


def test_a_form_of_five_thousand_parts_is_refused_naming_the_part_limit(user):
    from lampyr.webui.app import FORM_PARTS

    parts = [("token", user.token.encode(), None)] + [(f"f{i}", b"1", None) for i in range(5000)]
    resp = post_raw(user, multipart(parts))
    assert resp.status_code == 413
    assert resp.get_json() == {"error": f"form: more than this page's limit of {FORM_PARTS} parts"}


def test_a_form_of_as_many_parts_as_allowed_is_read(user):
    from lampyr.webui.app import FORM_PARTS

    parts = [("token", user.token.encode(), None)] + [(f"f{i}", b"1", None)
                                                      for i in range(FORM_PARTS - 1)]
    resp = post_raw(user, multipart(parts))
    assert resp.status_code == 400  # read, then refused for what it is: no shot file
    assert resp.get_json()["error"].startswith("shot:")


def test_a_huge_text_field_is_refused_naming_the_field_limit(user):
    from lampyr.webui.app import FORM_FIELD_BYTES

    parts = [("token", user.token.encode(), None), ("frames", b"1" * (FORM_FIELD_BYTES + 1), None)]
    resp = post_raw(user, multipart(parts))
    assert resp.status_code == 413
    assert resp.get_json() == {"error": "form: a field other than a file is larger than this "
                                        f"page's limit of {FORM_FIELD_BYTES / 1000:g} kB"}


def test_a_shot_nested_twenty_thousand_deep_is_a_400_naming_the_shot(user):
    deep = b"x = " + b"[" * 20000 + b"]" * 20000 + b"\n"
    resp = upload(user, shot=deep, archive=None)
    assert resp.status_code == 400
    msg = resp.get_json()["error"]
    # the shot reader's own line (engine/shot.py), naming the uploaded shot file
    assert msg.startswith("tiny.toml:") and "nesting too deep" in msg and "\n" not in msg

