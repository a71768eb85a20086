"""Shard faults: URL shards, cut-off tars, failing commands, repeated members, oversized members,
non-UTF-8 names, folder/relative-path messages and the resume identity of shards.

Every tar is built here in tmp_path; the only network is an HTTP server on 127.0.0.1 that the test
starts and stops itself.
"""

from __future__ import annotations

import functools
import http.server
import io
import hashlib
import json
import os
import pickle
import socket
import tarfile
import threading
import tracemalloc

import numpy as np
import pytest

from patchloom.read import tar as tar_reader
from patchloom.read import (
    ReaderCursor,
    ShardError,
    ShardTask,
    SourceError,
    describe_identity_change,
    expand_shards,
    fetch_records,
    read_shard,
    read_tasks,
    shard_identity,
)


def samples(n: int, *, seed: int = 0, big: int = 0) -> list[tuple[str, dict[str, bytes]]]:
    """n samples of random bytes (a jpg of varying size and a cls); `big` adds bytes to sample 1."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        size = int(rng.integers(0, 3000)) + (big if i == 1 else 0)
        out.append((f"k{i:04d}", {"jpg": rng.integers(0, 256, size, dtype=np.uint8).tobytes(),
                                  "cls": str(i % 7).encode()}))
    return out


def write_tar(path, items, *, mode: str = "w", fmt: int = tarfile.GNU_FORMAT):
    """items: (key, members) samples, or raw (name, bytes) pairs; returns the path."""
    with tarfile.open(path, mode, format=fmt, encoding="utf-8", errors="surrogateescape") as tar:
        for item in items:
            pairs = [(f"{item[0]}.{ext}", d) for ext, d in item[1].items()] if isinstance(item[1], dict) else [item]
            for name, data in pairs:
                info = tarfile.TarInfo(name)
                info.size, info.mtime = len(data), 0
                tar.addfile(info, io.BytesIO(data))
    return path


def header_offsets(path) -> dict[str, int]:
    """Byte offset of each member's header in a plain tar."""
    with tarfile.open(path) as tar:
        return {m.name: m.offset for m in tar.getmembers()}


def data_end(path) -> int:
    """Byte offset just after the last member's data padding (where the end-of-archive blocks start)."""
    with tarfile.open(path) as tar:
        last = tar.getmembers()[-1]
    return last.offset_data + (last.size + 511) // 512 * 512


def read_all(url: str, **kw) -> tuple[list, Exception | None]:
    out = []
    try:
        for rec in read_shard(ShardTask(url), **kw):
            out.append(rec)
    except SourceError as exc:
        return out, exc
    return out, None


# ----------------------------------------------------------------------------- URL shards


class _QuietHandler(http.server.SimpleHTTPRequestHandler):
    def log_message(self, *args) -> None:  # keep the test output clean
        pass


@pytest.fixture
def http_root(tmp_path, monkeypatch):
    """(folder, base URL) of an HTTP server on 127.0.0.1 serving tmp_path, stopped after the test."""
    for var in ("http_proxy", "HTTP_PROXY", "https_proxy", "HTTPS_PROXY", "all_proxy", "ALL_PROXY"):
        monkeypatch.delenv(var, raising=False)
    monkeypatch.setattr(tar_reader, "URL_TIMEOUT_S", 10.0)
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0),
                                             functools.partial(_QuietHandler, directory=str(tmp_path)))
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    try:
        yield tmp_path, f"http://127.0.0.1:{server.server_address[1]}"
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)


def test_http_shard_is_read_in_full(http_root):
    folder, base = http_root
    items = samples(40, big=3_000_000)  # one member larger than any single network read
    write_tar(folder / "web.tar", items)
    recs, err = read_all(f"{base}/web.tar")
    assert err is None
    assert [(r.key, r.members) for r in recs] == items
    assert all(r.url == f"{base}/web.tar" and r.error is None for r in recs)
    assert [r.index for r in recs] == list(range(40))


def test_http_missing_refused_and_cut_are_shard_errors(http_root):
    folder, base = http_root
    recs, err = read_all(f"{base}/nope.tar")
    assert recs == [] and isinstance(err, ShardError)
    assert f"{base}/nope.tar" in str(err) and "404" in str(err) and err.url == f"{base}/nope.tar"

    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    url = f"http://127.0.0.1:{port}/x.tar"
    recs, err = read_all(url)
    assert recs == [] and isinstance(err, ShardError) and url in str(err) and "cannot connect" in str(err)

    path = write_tar(folder / "cut.tar", samples(3))
    path.write_bytes(path.read_bytes()[: header_offsets(path)["k0002.jpg"]])
    recs, err = read_all(f"{base}/cut.tar")
    assert isinstance(err, ShardError) and "end-of-archive" in str(err)


def test_store_url_without_a_reader_says_what_to_do():
    recs, err = read_all("s3://bucket/part-000.tar")
    assert recs == [] and isinstance(err, ShardError)
    assert "s3://bucket/part-000.tar" in str(err) and "pipe:aws s3 cp s3://bucket/part-000.tar -" in str(err)


# ----------------------------------------------------------------------------- cut-off tars


def test_cut_between_samples_is_a_shard_error_and_last_sample_is_an_error(tmp_path):
    path = write_tar(tmp_path / "cut.tar", samples(4))
    path.write_bytes(path.read_bytes()[: header_offsets(path)["k0002.jpg"]])  # exactly at a header
    recs, err = read_all(str(path))
    assert isinstance(err, ShardError)
    assert str(err).startswith(f"shard {path}: the shard ends without the tar end-of-archive blocks: it was cut off")
    assert "after member 4 / key 'k0001'" in str(err)
    # k0000 is whole (k0001 started after it); k0001 may be missing members: it is an error, not short.
    assert [(r.key, r.error is None) for r in recs] == [("k0000", True), ("k0001", False)]
    assert set(recs[0].members) == {"jpg", "cls"}
    assert "broke off" in recs[1].error and recs[1].members == {}


def test_cut_inside_a_sample_at_a_member_boundary(tmp_path):
    path = write_tar(tmp_path / "cut.tar", samples(4))
    path.write_bytes(path.read_bytes()[: header_offsets(path)["k0002.cls"]])  # label lost
    recs, err = read_all(str(path))
    assert isinstance(err, ShardError) and "after member 5 / key 'k0002'" in str(err)
    assert [(r.key, r.error is None) for r in recs] == [("k0000", True), ("k0001", True), ("k0002", False)]


def test_cut_inside_member_data_and_inside_a_header(tmp_path):
    path = write_tar(tmp_path / "cut.tar", samples(3))
    raw = path.read_bytes()
    offsets = header_offsets(path)
    path.write_bytes(raw[: offsets["k0001.jpg"] + 512 + 10])
    recs, err = read_all(str(path))
    assert "unexpected end of data in member 'k0001.jpg'" in str(err)
    assert [(r.key, r.error is None) for r in recs] == [("k0000", True), ("k0001", False)]
    path.write_bytes(raw[: offsets["k0001.jpg"] + 100])
    recs, err = read_all(str(path))
    assert "ends inside a tar header" in str(err)
    assert [(r.key, r.error is None) for r in recs] == [("k0000", False)]


def test_end_marker_variants(tmp_path):
    items = samples(3)
    path = write_tar(tmp_path / "a.tar", items)
    raw = path.read_bytes()
    end = data_end(path)
    assert len(raw) >= end + 1024 and raw[end:].count(0) == len(raw) - end  # tarfile pads with zeros
    for tail, ok in ((0, False), (512, True), (1024, True), (len(raw) - end, True)):
        path.write_bytes(raw[: end + tail])
        recs, err = read_all(str(path))
        assert (err is None) == ok, (tail, err)
        if ok:
            assert [(r.key, r.members) for r in recs] == items
    path.write_bytes(b"")
    assert "empty (0 bytes)" in str(read_all(str(path))[1])


def test_a_second_tar_glued_after_the_end_marker_is_not_lost_silently(tmp_path):
    first = write_tar(tmp_path / "a.tar", samples(2)).read_bytes()
    second = write_tar(tmp_path / "b.tar", samples(2, seed=1)).read_bytes()
    (tmp_path / "ab.tar").write_bytes(first + second)
    recs, err = read_all(str(tmp_path / "ab.tar"))
    assert len(recs) == 2 and isinstance(err, ShardError)
    assert "a tar member header follows the end-of-archive blocks" in str(err)
    # Other bytes after the end are ignored, as tar readers do (some writers leave garbage there).
    (tmp_path / "junk.tar").write_bytes(first + b"\x01junk" * 100)
    recs, err = read_all(str(tmp_path / "junk.tar"))
    assert err is None and len(recs) == 2


@pytest.mark.parametrize("mode", ["w:gz", "w:bz2", "w:xz"])
def test_compressed_shards_read_like_plain_ones(tmp_path, mode):
    items = samples(6)
    recs, err = read_all(str(write_tar(tmp_path / "c.tar.x", items, mode=mode)))
    assert err is None and [(r.key, r.members) for r in recs] == items
    # A plain tar whose first name starts like a bzip2 stream ("BZh9") stays a plain tar.
    recs, err = read_all(str(write_tar(tmp_path / "p.tar", [("BZh91AY.jpg", b"1"), ("b.jpg", b"2")])))
    assert err is None and [r.key for r in recs] == ["BZh91AY", "b"]


def test_gzip_shard_cut_off_is_a_shard_error(tmp_path):
    items = samples(5)
    path = write_tar(tmp_path / "a.tar.gz", items, mode="w:gz")
    recs, err = read_all(str(path))
    assert err is None and [(r.key, r.members) for r in recs] == items
    path.write_bytes(path.read_bytes()[:-40])
    recs, err = read_all(str(path))
    assert isinstance(err, ShardError) and str(path) in str(err)
    assert all(r.error is None for r in recs[:-1])


def test_pipe_command_exit_status_is_checked(tmp_path):
    items = samples(3)
    path = write_tar(tmp_path / "a.tar", items)
    ok, err = read_all(f"pipe:cat {path}", allow_shell=True)
    assert err is None and [(r.key, r.members) for r in ok] == items

    url = f"pipe:cat {path}; echo disk on fire >&2; exit 3"
    recs, err = read_all(url, allow_shell=True)
    assert [(r.key, r.members) for r in recs] == items  # the tar itself was whole
    assert isinstance(err, ShardError) and url in str(err)
    assert "exited with status 3" in str(err) and "disk on fire" in str(err)

    cut = header_offsets(path)["k0001.jpg"]
    url = f"pipe:head -c {cut} {path}; exit 7"
    recs, err = read_all(url, allow_shell=True)
    assert "exited with status 7" in str(err) and "it was cut off" in str(err)
    assert [(r.key, r.error is None) for r in recs] == [("k0000", False)]


def test_a_silent_pipe_command_is_a_shard_error_not_a_hang(tmp_path, monkeypatch):
    """A command that stops sending (a stalled download) fails the shard after the stall limit."""
    import patchloom.read.tar as tar_mod

    monkeypatch.setattr(tar_mod, "PIPE_STALL_TIMEOUT_S", 0.3)
    path = write_tar(tmp_path / "a.tar", samples(2))
    url = f"pipe:head -c 600 {path}; sleep 30"  # half a header, then silence
    recs, err = read_all(url, allow_shell=True)
    assert isinstance(err, ShardError) and "sent nothing for" in str(err) and url in str(err)
    ok, err = read_all(f"pipe:sleep 0.05; cat {path}", allow_shell=True)  # slow but alive is fine
    assert err is None and len(ok) == 2


def test_shard_errors_go_to_the_callback_or_raise_naming_the_shard(tmp_path):
    bad = write_tar(tmp_path / "bad.tar", samples(3))
    bad.write_bytes(bad.read_bytes()[: header_offsets(bad)["k0002.jpg"]])
    good = write_tar(tmp_path / "good.tar", samples(2, seed=4))
    tasks = [ShardTask(str(bad)), ShardTask(str(good))]
    seen: list[tuple[str, Exception]] = []
    recs = list(read_tasks(tasks, on_shard_error=lambda url, exc: seen.append((url, exc))))
    assert [u for u, _ in seen] == [str(bad)] and isinstance(seen[0][1], ShardError)
    assert [r.key for r in recs if r.url == str(good)] == ["k0000", "k0001"]
    with pytest.raises(ShardError, match="bad.tar.*cut off"):
        list(read_tasks(tasks))
    seen.clear()
    cursor = ReaderCursor(tasks, on_shard_error=lambda url, exc: seen.append((url, exc)))
    assert len(list(cursor)) == 2 + 2 and [u for u, _ in seen] == [str(bad)]
    with pytest.raises(ShardError, match="bad.tar"):
        list(ReaderCursor(tasks))
    # A bad spec is not a shard failure: it raises even with a callback.
    with pytest.raises(SourceError, match="allow_shell") as info:
        list(read_tasks([ShardTask("pipe:true")], on_shard_error=lambda url, exc: None))
    assert not isinstance(info.value, ShardError)


def test_shard_error_survives_pickling():
    err = pickle.loads(pickle.dumps(ShardError("shard x.tar: cut off", "x.tar")))
    assert isinstance(err, ShardError) and isinstance(err, SourceError)
    assert str(err) == "shard x.tar: cut off" and err.url == "x.tar"


# ----------------------------------------------------------------------------- repeated members


@pytest.mark.parametrize("second", ["k0005.jpg", "k0005.JPG"])
def test_repeated_member_skips_only_that_sample(tmp_path, second):
    items = samples(200)
    pairs = []
    for key, members in items:
        pairs += [(f"{key}.{ext}", data) for ext, data in members.items()]
        if key == "k0005":
            pairs.append((second, b"again"))
    path = write_tar(tmp_path / "dup.tar", pairs)
    recs, err = read_all(str(path))
    assert err is None and len(recs) == 200
    assert [r.index for r in recs] == list(range(200))
    bad = [r for r in recs if r.error is not None]
    assert [r.key for r in bad] == ["k0005"] and bad[0].members == {}
    assert bad[0].error.startswith("duplicated member 'jpg' in sample 'k0005'") and second in bad[0].error
    assert [(r.key, r.members) for r in recs if r.error is None] == [s for s in items if s[0] != "k0005"]


# ----------------------------------------------------------------------------- oversized members


class _Zeros(io.RawIOBase):
    """n zero bytes, made as they are read (so writing the test tar needs no memory)."""

    def __init__(self, n: int) -> None:
        self.n = n

    def readable(self) -> bool:
        return True

    def readinto(self, buf) -> int:
        k = min(len(buf), self.n)
        buf[:k] = bytes(k)
        self.n -= k
        return k


BIG = 50_000_000


def write_big(path, mode: str):
    with tarfile.open(path, mode, **({"compresslevel": 1} if mode == "w:gz" else {})) as tar:
        for name, size in (("a.jpg", 100), ("b.jpg", BIG), ("b.cls", 1), ("c.jpg", 100)):
            info = tarfile.TarInfo(name)
            info.size = size
            tar.addfile(info, _Zeros(size))
    return path


@pytest.mark.parametrize("mode,name", [("w", "big.tar"), ("w:gz", "big.tar.gz")])
def test_oversized_member_is_streamed_past_without_loading_it(tmp_path, mode, name):
    path = str(write_big(tmp_path / name, mode))
    tracemalloc.start()
    try:
        recs, err = read_all(path, max_sample_bytes=1_000_000)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert err is None
    assert peak < BIG // 10, peak  # the 50 MB member never sits in memory
    assert [(r.key, r.error is None) for r in recs] == [("a", True), ("b", False), ("c", True)]
    assert recs[1].error == ("member 'b.jpg' is 50000000 bytes, over source.max_sample_bytes=1000000; "
                             "raise it in the recipe if such samples are expected")
    assert recs[2].members == {"jpg": bytes(100)}


def test_sample_total_over_the_limit_and_the_keyword_everywhere(tmp_path):
    pairs = [("a.jpg", b"x" * 600), ("a.png", b"y" * 600), ("b.jpg", b"z" * 900)]
    path = str(write_tar(tmp_path / "t.tar", pairs))
    recs, err = read_all(path, max_sample_bytes=1000)
    assert err is None and recs[0].error.startswith("sample 'a' reaches 1200 bytes with member 'a.png'")
    assert "source.max_sample_bytes=1000" in recs[0].error and recs[1].members == {"jpg": b"z" * 900}
    assert [r.error is None for r in ReaderCursor([ShardTask(path)], max_sample_bytes=1000)] == [False, True]
    assert [r.error is None for r in read_tasks([ShardTask(path)], max_sample_bytes=1000)] == [False, True]
    got = fetch_records([(path, 1), (path, 0)], max_sample_bytes=1000)
    assert [r.key for r in got] == ["b", "a"] and got[1].error is not None
    assert all(r.error is None for r in fetch_records([(path, 0), (path, 1)]))


# ----------------------------------------------------------------------------- names


@pytest.mark.parametrize("fmt", [tarfile.GNU_FORMAT, tarfile.PAX_FORMAT, tarfile.USTAR_FORMAT])
def test_non_utf8_member_names_give_valid_escaped_keys(tmp_path, fmt):
    name = b"caf\xe9-\xff.jpg".decode("utf-8", "surrogateescape")  # raw Latin-1 bytes in the tar
    path = write_tar(tmp_path / "n.tar", [(name, b"img"), ("ok.jpg", b"fine")], fmt=fmt)
    assert b"caf\xe9-\xff" in path.read_bytes()
    recs, err = read_all(str(path))
    assert err is None and [r.key for r in recs] == ["caf\\xe9-\\xff", "ok"]
    key = recs[0].key
    assert json.loads(json.dumps(key)) == key and key.encode("utf-8") == b"caf\\xe9-\\xff"
    assert recs[0].members == {"jpg": b"img"}


def test_long_names_and_odd_members_are_read_as_webdataset_does(tmp_path):
    long_key = "deep/" * 40 + "x" * 120
    path = tmp_path / "odd.tar"
    with tarfile.open(path, "w", format=tarfile.PAX_FORMAT) as tar:
        for name, kind in (("folder", tarfile.DIRTYPE), ("link.jpg", tarfile.SYMTYPE), ("fifo.jpg", tarfile.FIFOTYPE)):
            info = tarfile.TarInfo(name)
            info.type, info.linkname = kind, "a.jpg"
            tar.addfile(info)
        for name, data in ((f"{long_key}.JPG", b"1"), (f"{long_key}.cls", b"2"), ("noext", b"3"),
                           ("__meta__", b"4"), ("e.txt", b"")):
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tar.addfile(info, io.BytesIO(data))
    recs, err = read_all(str(path))
    assert err is None
    assert [(r.key, r.members) for r in recs] == [(long_key, {"jpg": b"1", "cls": b"2"}), ("e", {"txt": b""})]


# ----------------------------------------------------------------------------- shard specs


def test_folder_and_relative_missing_paths_say_what_to_do(tmp_path, monkeypatch):
    folder = tmp_path / "shards"
    folder.mkdir()
    for i in range(2):
        write_tar(folder / f"p{i}.tar", samples(1))
    with pytest.raises(SourceError, match=r"is a folder; did you mean '.*shards/\*\.tar'\? \(it holds 2 \.tar files\)"):
        expand_shards(str(folder))
    monkeypatch.chdir(tmp_path)
    with pytest.raises(SourceError) as info:
        expand_shards("patchloom-demo/demo-{000000..000001}.tar")
    text = str(info.value)
    assert "does not exist" in text and str(tmp_path) in text and "current working directory" in text
    assert "patchloom demo" in text
    with pytest.raises(SourceError) as info:
        expand_shards("other.tar")
    assert str(tmp_path) in str(info.value) and "patchloom demo" not in str(info.value)
    with pytest.raises(SourceError) as info:
        expand_shards(str(tmp_path / "gone.tar"))
    assert "current working directory" not in str(info.value)


# ----------------------------------------------------------------------------- resume identity


def test_shard_identity_and_changes(tmp_path):
    a = write_tar(tmp_path / "a.tar", samples(2))
    b = write_tar(tmp_path / "b.tar", samples(3))
    ida = shard_identity(str(a))
    st = os.stat(a)
    data = a.read_bytes()
    assert len(data) < 64 * 1024  # a small shard: the probe is the hash of the whole file
    probe = hashlib.blake2b(data, digest_size=12).hexdigest()
    assert ida == {"url": str(a), "size": st.st_size, "mtime": st.st_mtime, "probe": probe}
    none = {"size": None, "mtime": None, "probe": None}
    assert shard_identity("https://h.invalid/x.tar") == {"url": "https://h.invalid/x.tar", **none}
    assert shard_identity("pipe:cat x") == {"url": "pipe:cat x", **none}

    saved = json.loads(json.dumps([shard_identity(str(a)), shard_identity(str(b))]))  # as a state stores it
    assert describe_identity_change(saved, [shard_identity(str(a)), shard_identity(str(b))]) is None
    msg = describe_identity_change(saved, [shard_identity(str(b)), shard_identity(str(a))])
    assert "reordered" in msg and "position 0" in msg
    c = write_tar(tmp_path / "c.tar", samples(1))
    msg = describe_identity_change(saved, [shard_identity(str(a)), shard_identity(str(c))])
    assert "different shard" in msg and str(c) in msg
    msg = describe_identity_change(saved, [shard_identity(str(a))])
    assert "from 2 to 1 shards" in msg

    old_size = os.stat(b).st_size
    write_tar(b, samples(9))
    msg = describe_identity_change(saved, [shard_identity(str(a)), shard_identity(str(b))])
    assert msg == f"shard {b} was rewritten since the state was saved (size {old_size} -> {os.stat(b).st_size})"
    write_tar(b, samples(3))  # same size again, later mtime
    os.utime(b, (st.st_atime, saved[1]["mtime"] + 5))
    msg = describe_identity_change(saved, [shard_identity(str(a)), shard_identity(str(b))])
    assert "rewritten" in msg and "mtime" in msg
    b.unlink()
    msg = describe_identity_change(saved, [shard_identity(str(a)), shard_identity(str(b))])
    assert "can no longer be read" in msg


# ----------------------------------------------------------------------------- members of no sample


def _tar_with_strays(path):
    """Two samples, plus a directory, a member without an extension, a symlink and a hard link."""
    with tarfile.open(path, "w", format=tarfile.GNU_FORMAT) as tar:
        def add(name, data=b"", kind=tarfile.REGTYPE, link=""):
            info = tarfile.TarInfo(name)
            info.type, info.linkname, info.size = kind, link, len(data)
            tar.addfile(info, io.BytesIO(data) if data else None)
        add("photos/", kind=tarfile.DIRTYPE)
        add("photos/a.jpg", b"x" * 10)
        add("photos/a.cls", b"1")
        add("photos/b_without_ext", b"y" * 10)
        add("photos/c.jpg", kind=tarfile.SYMTYPE, link="a.jpg")
        add("photos/d.jpg", kind=tarfile.LNKTYPE, link="photos/a.jpg")
        add("photos/e.jpg", b"z" * 10)
    return str(path)


def test_members_of_no_sample_are_named_once_per_shard(tmp_path, caplog):
    url = _tar_with_strays(tmp_path / "s.tar")
    with caplog.at_level("WARNING", logger="patchloom"):
        recs, err = read_all(url)
    assert err is None and [r.key for r in recs] == ["photos/a", "photos/e"]
    said = [r.getMessage() for r in caplog.records]
    assert len(said) == 1 and "3 member(s) belong to no sample" in said[0], said
    assert all(repr(n) in said[0] for n in ("photos/b_without_ext", "photos/c.jpg", "photos/d.jpg"))
    assert "photos/'" not in said[0]  # a directory is no stray
    caplog.clear()
    with caplog.at_level("WARNING", logger="patchloom"):  # the other readers of a split shard stay quiet
        assert [r.key for r in read_shard(ShardTask(url, part=1, parts=2))] == ["photos/e"]
    assert not caplog.records


def test_many_long_stray_names_give_a_short_warning(tmp_path, caplog):
    """Only the first five names are kept (each shortened), whatever the shard holds."""
    long_name = "x" * 5000
    items = [(f"{long_name}{i}", b"") for i in range(40)] + [("k.jpg", b"1")]
    url = str(write_tar(tmp_path / "s.tar", items, fmt=tarfile.PAX_FORMAT))
    with caplog.at_level("WARNING", logger="patchloom"):
        recs, err = read_all(url)
    assert err is None and [r.key for r in recs] == ["k"]
    (msg,) = [r.getMessage() for r in caplog.records]
    assert "40 member(s) belong to no sample" in msg and msg.count("...") == 6  # five shortened names, then ...
    assert len(msg) < 1000
