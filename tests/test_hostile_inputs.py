"""Hostile inputs through the whole pipeline: every bad sample is a correct image or a clear skip.

The corpus is built in tmp_path as tar shards. Each entry states what must come out: an image
(with its grid and, where it matters, its pixel values) or a skip (stage and words of the reason).
Pixel checks use `sizing.mode: native` on images whose sides are multiples of the patch size, so
no resize happens and the emitted tokens are the decoded pixels.
"""

from __future__ import annotations

import io
import resource
import struct
import tarfile
import zlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageOps

from patchloom import Pipeline, Recipe, SampleError, SourceError, unpatchify
from patchloom.image.decode import OpenedImage

from conftest import encode_png, write_shard

P = 8  # patch size
MAX_TOKENS = 64
BG = (255, 255, 255)


def recipe(on_error: str = "skip") -> Recipe:
    return Recipe.from_dict({
        "seed": 1,
        # The corpus is hostile on purpose (a cut shard among few): the skip guard is tested elsewhere.
        "source": {"on_error": on_error, "shuffle_shards": False, "shuffle_buffer": 0, "max_skip_ratio": None},
        "sizing": {"patch_size": P, "max_tokens": MAX_TOKENS, "mode": "native"},
        "packing": {"seq_len": MAX_TOKENS, "rows": 2, "max_images_per_row": 4, "lookahead": 4},
        "output": {"dtype": "uint8"},
    })


# ----------------------------------------------------------------------------- encoders


def png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def raw_png(width: int, height: int, *, bit_depth: int, colour_type: int, rows: bytes | None) -> bytes:
    """A PNG from raw scanlines (filter byte 0 already included), CRCs correct."""
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    idat = zlib.compress(rows if rows is not None else b"\x00" * 64)
    return b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", ihdr) + png_chunk(b"IDAT", idat) + png_chunk(b"IEND", b"")


def png16(arr: np.ndarray) -> bytes:
    """16-bit grey (H, W) or RGB (H, W, 3) PNG, big-endian samples as the format requires."""
    h, w = arr.shape[:2]
    colour_type = 0 if arr.ndim == 2 else 2
    body = arr.astype(">u2").reshape(h, -1).tobytes()
    stride = len(body) // h
    rows = b"".join(b"\x00" + body[i * stride:(i + 1) * stride] for i in range(h))
    return raw_png(w, h, bit_depth=16, colour_type=colour_type, rows=rows)


def save(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, format=fmt, **kw)
    return buf.getvalue()


def jpeg(arr: np.ndarray, **kw) -> bytes:
    return save(Image.fromarray(arr), "JPEG", quality=95, **kw)


def ycck_jpeg() -> bytes:
    """A CMYK JPEG whose Adobe APP14 marker is switched to transform 2 (YCCK)."""
    data = bytearray(save(Image.new("CMYK", (32, 16), (10, 200, 30, 40)), "JPEG", quality=95))
    at = data.find(b"\xff\xeeAdobe"[:2] + b"\x00\x0eAdobe")
    assert at >= 0, "Pillow wrote no Adobe marker"
    data[at + 15] = 2  # marker(2) length(2) 'Adobe'(5) version(2) flags0(2) flags1(2) -> transform
    return bytes(data)


def exif_jpeg(arr: np.ndarray, orientation: int) -> bytes:
    exif = Image.Exif()
    exif[0x0112] = orientation
    return jpeg(arr, exif=exif.tobytes())


def quadrants(h: int, w: int) -> np.ndarray:
    """Four flat colour blocks, so any flip or rotation is visible."""
    out = np.zeros((h, w, 3), np.uint8)
    out[: h // 2, : w // 2] = (250, 20, 20)
    out[: h // 2, w // 2:] = (20, 250, 20)
    out[h // 2:, : w // 2] = (20, 20, 250)
    out[h // 2:, w // 2:] = (240, 240, 30)
    return out


def composite(c, a):
    c, a = np.asarray(c, np.int64), int(a)
    return (c * a + np.asarray(BG) * (255 - a) + 127) // 255


def scale16(v):
    return (np.asarray(v, np.int64) * 255 + 32767) // 65535


# ----------------------------------------------------------------------------- the corpus

RED = np.full((16, 16, 3), (255, 0, 0), np.uint8)
GRAY16 = np.tile(np.array([0, 255, 256, 1000, 32768, 40000, 65280, 65535], np.uint16), (16, 2))  # 16 x 16
RGB16 = np.stack([GRAY16, GRAY16[::-1], np.full_like(GRAY16, 0x7F80)], axis=-1)


def corpus() -> tuple[list[tuple[str, dict[str, bytes]]], dict[str, dict]]:
    """(samples in tar order, expectation per key). Expectation: {"skip": (stage, words)} or
    {"grid": (gh, gw) | None, "pixels": HxWx3 array | None, "tol": int}."""
    rng = np.random.default_rng(3)
    samples: list[tuple[str, dict[str, bytes]]] = []
    expect: dict[str, dict] = {}

    def good(key, members, grid=None, pixels=None, tol=0):
        samples.append((key, members))
        expect[key] = {"grid": grid, "pixels": pixels, "tol": tol}

    def bad(key, members, stage, *words):
        samples.append((key, members))
        expect[key] = {"skip": (stage, words)}

    good("control", {"png": encode_png(RED), "cls": b"1"}, (2, 2), RED)
    noise = rng.integers(0, 256, (64, 48, 3), dtype=np.uint8)
    bad("trunc-jpg", {"jpg": jpeg(noise)[:900], "cls": b"0"}, "decode", "truncated")
    bad("zero-byte", {"jpg": b""}, "decode", "not a readable image", "0 bytes")
    bad("html-as-jpg", {"jpg": b"<!doctype html><html><body>404 Not Found</body></html>\n"},
        "decode", "not a readable image")
    bad("huge-header", {"png": raw_png(30000, 30000, bit_depth=8, colour_type=2, rows=None)},
        "decode", "900000000 pixels", "decode.pixel_limit")
    # Under Pillow's own hard limit but over the recipe's: our header check refuses it.
    bad("big-header", {"png": raw_png(12000, 12000, bit_depth=8, colour_type=2, rows=None)},
        "decode", "12000x12000", "decode.pixel_limit=64000000")
    cmyk = save(Image.new("CMYK", (32, 16), (0, 255, 255, 0)), "JPEG", quality=95)
    good("cmyk", {"jpg": cmyk}, (2, 4), np.asarray(Image.open(io.BytesIO(cmyk)).convert("RGB")), 0)
    ycck = ycck_jpeg()
    good("ycck", {"jpg": ycck}, (2, 4), np.asarray(Image.open(io.BytesIO(ycck)).convert("RGB")), 0)
    good("gray16", {"png": png16(GRAY16)}, (2, 2), np.repeat(scale16(GRAY16)[..., None], 3, axis=2))
    good("rgb16", {"png": png16(RGB16)}, (2, 2), scale16(RGB16), 1)  # see test_rgb16_png_rounds_exactly
    pal = Image.new("P", (16, 16), 0)
    pal.putpalette([255, 0, 0, 0, 0, 255] + [0] * (3 * 254))
    pal.paste(1, (8, 0, 16, 16))
    want = np.zeros((16, 16, 3), np.int64)
    want[:, :8], want[:, 8:] = BG, (0, 0, 255)  # index 0 fully transparent -> background
    good("palette-trns", {"png": save(pal, "PNG", transparency=0)}, (2, 2), want)
    la = Image.fromarray(np.dstack([np.full((16, 16), 100, np.uint8), np.full((16, 16), 128, np.uint8)]), "LA")
    good("la", {"png": save(la, "PNG")}, (2, 2), np.broadcast_to(composite((100, 100, 100), 128), (16, 16, 3)))
    rgba = Image.new("RGBA", (16, 16), (200, 10, 50, 64))
    good("rgba", {"png": save(rgba, "PNG")}, (2, 2), np.broadcast_to(composite((200, 10, 50), 64), (16, 16, 3)))
    frames = [Image.new("RGB", (16, 16), c).convert("P") for c in ((255, 0, 0), (0, 255, 0))]
    gif = save(frames[0], "GIF", save_all=True, append_images=frames[1:], duration=50, loop=0)
    good("gif-anim", {"gif": gif}, (2, 2), RED)
    stored = quadrants(16, 32)  # stored 32 wide, 16 high
    for o in range(2, 9):
        data = exif_jpeg(stored, o)
        display = np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(data))).convert("RGB"))
        assert display.shape[:2] == ((32, 16) if o >= 5 else (16, 32))
        good(f"exif-{o}", {"jpg": data}, (4, 2) if o >= 5 else (2, 4), display, 0)
    for w, h in ((1, 1), (3, 2), (4000, 6), (5, 3000)):
        good(f"size-{w}x{h}", {"png": encode_png(rng.integers(0, 256, (h, w, 3), dtype=np.uint8))})
    bad("no-image", {"cls": b"3", "txt": b"caption only"}, "select", "no image member", "cls, txt")
    blue = np.full((16, 16, 3), (0, 0, 255), np.uint8)
    # default image_keys order is jpg, jpeg, png, ...: the jpg member wins over the png one.
    good("two-images", {"png": encode_png(blue), "jpg": jpeg(RED)}, (2, 2), RED, 8)
    good("dup", {"png": encode_png(RED), "cls": b"1"}, (2, 2), RED)
    bad("label-bytes", {"png": encode_png(RED), "cls": b"\xff\xfe\x00"}, "select", "not UTF-8 text", "'cls'")
    bad("label-text", {"png": encode_png(RED), "cls": b"cat"}, "select", "must be an integer", "'cat'")
    good("dup", {"png": encode_png(blue), "cls": b"2"}, (2, 2), blue)  # same key again, not adjacent
    return samples, expect


def build(folder: Path) -> tuple[list[str], dict[str, dict], dict[str, str]]:
    samples, expect = corpus()
    main = write_shard(folder / "main.tar", samples)
    # Two members with the same name next to each other: that sample is skipped, the rest is read.
    adjacent = folder / "adjacent-dup.tar"
    png = encode_png(RED)
    with tarfile.open(adjacent, "w") as tar:
        for name in ("twice.png", "twice.png", "after.png"):
            info = tarfile.TarInfo(name)
            info.size = len(png)
            tar.addfile(info, io.BytesIO(png))
    # A tar cut off in the middle of its second member.
    cut = write_shard(folder / "cut.tar", [(f"cut-{i}", {"png": encode_png(RED)}) for i in range(3)])
    raw = cut.read_bytes()
    second = raw.find(b"cut-1.png")
    cut.write_bytes(raw[: second + 512 + 40])
    tail = write_shard(folder / "tail.tar", [("tail", {"png": encode_png(RED)})])
    shards = [str(main), str(adjacent), str(cut), str(tail)]
    names = {"main": str(main), "adjacent": str(adjacent), "cut": str(cut), "tail": str(tail)}
    return shards, expect, names


def emitted_images(batch, pipe) -> list[tuple[str, tuple[int, int], np.ndarray]]:
    out = []
    for r, keys in enumerate(batch.keys):
        for j, key in enumerate(keys):
            sel = batch.segment_ids[r] == j + 1
            grid = tuple(int(v) for v in batch.grids[r, j])
            img = unpatchify(batch.patches[r][sel], batch.coords[r][sel], grid, P)
            out.append((key, grid, img))
    return out


# ----------------------------------------------------------------------------- tests


def test_missing_shard_is_refused_at_construction(tmp_path):
    with pytest.raises(SourceError, match="does not exist"):
        Pipeline(recipe(), [str(tmp_path / "nope.tar")])


def test_hostile_corpus_skip(tmp_path, monkeypatch):
    shards, expect, names = build(tmp_path)
    import webdataset  # noqa: F401  (first import pulls in torch: not part of what is measured)

    decoded: list[tuple[int, int]] = []  # (width, height) of every image whose pixels were decoded
    real_decode = OpenedImage.decode

    def counted(self, **kw):
        decoded.append((self.width, self.height))
        return real_decode(self, **kw)

    monkeypatch.setattr(OpenedImage, "decode", counted)
    pipe = Pipeline(recipe("skip"), shards)
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    seen: dict[str, list[tuple[tuple[int, int], np.ndarray]]] = {}
    for batch in pipe:
        led = pipe.ledger
        assert led.read == led.emitted + len(led.skipped) + pipe.in_buffer
        for key, grid, img in emitted_images(batch, pipe):
            seen.setdefault(key, []).append((grid, img))
    led = pipe.ledger
    assert pipe.in_buffer == 0 and led.read == led.emitted + len(led.skipped)
    # The 30000x30000 and 12000x12000 headers are refused from the header: no image over the
    # corpus's largest good one (4000x6 = 24,000 pixels) is ever decoded, at most one decode per
    # sample read, and the 2.7 GB the pixels would take are never allocated.
    assert decoded and max(w * h for w, h in decoded) <= 24_000, max(decoded, key=lambda s: s[0] * s[1])
    assert len(decoded) <= led.read
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - rss0 < 300 * 1024

    skipped = {s.key: s for s in led.skipped}
    for s in led.skipped:
        assert s.shard == {"cut-1": names["cut"], "twice": names["adjacent"]}.get(s.key, names["main"])
    for key, exp in expect.items():
        if "skip" in exp:
            stage, words = exp["skip"]
            assert key in skipped and key not in seen, key
            assert skipped[key].stage == stage, (key, skipped[key])
            for word in words:
                assert word in skipped[key].reason, (key, word, skipped[key].reason)
            continue
        assert key in seen and key not in skipped, (key, skipped.get(key))
        for grid, img in seen[key]:
            gh, gw = grid
            assert gh >= 1 and gw >= 1 and gh * gw <= MAX_TOKENS, (key, grid)
            assert img.shape == (gh * P, gw * P, 3)
            if exp["grid"] is not None:
                assert grid == exp["grid"], key
    assert sorted(skipped) == sorted([k for k, e in expect.items() if "skip" in e] + ["cut-1", "twice"])

    # Pixel values (first emission of each key; "dup" checked below).
    for key, exp in expect.items():
        if "skip" in exp or exp["pixels"] is None or key == "dup":
            continue
        (_, img), = seen[key]
        diff = np.abs(img.astype(np.int64) - np.asarray(exp["pixels"], np.int64))
        assert diff.max() <= exp["tol"], (key, int(diff.max()))

    # Non-adjacent duplicate keys within a shard: two separate samples, both emitted, in tar order.
    assert [int(img[0, 0, 2]) for _, img in seen["dup"]] == [0, 255]

    # Adjacent duplicate member names: that sample is skipped with a reason and the rest of the
    # shard is read. The cut tar is reported and the
    # stream continues with the next shard; cut-0, complete before the cut, is kept and cut-1,
    # the sample it broke off in, is skipped with a reason (test_sample_before_a_cut_member_is_kept).
    errors = {s.shard: s for s in led.shard_errors}
    assert set(errors) == {names["cut"]}
    assert skipped["twice"].stage == "read" and "duplicated member 'png'" in skipped["twice"].reason
    assert "twice" not in seen and "after" in seen
    assert errors[names["cut"]].stage == "read"
    assert "end of data" in errors[names["cut"]].reason
    assert "cut-0" in seen and "cut-1" not in seen and "cut-2" not in seen
    assert skipped["cut-1"].stage == "read"
    assert "tail" in seen


def test_hostile_corpus_raise_names_first_bad_sample(tmp_path):
    shards, expect, names = build(tmp_path)
    with pytest.raises(SampleError) as info:
        for _ in Pipeline(recipe("raise"), shards):
            pass
    err = info.value
    assert (err.shard, err.key, err.stage) == (names["main"], "trunc-jpg", "decode")
    assert names["main"] in str(err) and "'trunc-jpg'" in str(err) and "stage decode" in str(err)


def test_hostile_shard_raises_without_skip(tmp_path):
    _, _, names = build(tmp_path)
    # Raise mode: the sample the shard broke off in is the first error, naming shard, key, stage.
    with pytest.raises(SampleError, match=r"cut.tar, key 'cut-1', stage read: .*broke off"):
        for _ in Pipeline(recipe("raise"), [names["cut"]]):
            pass
    # A repeated member name fails that sample only, naming it.
    with pytest.raises(SampleError, match=r"adjacent-dup.tar, key 'twice', stage read: .*duplicated member"):
        for _ in Pipeline(recipe("raise"), [names["adjacent"]]):
            pass
    # A broken shard seen without a sample in progress (an empty file) raises SourceError.
    empty = tmp_path / "empty.tar"
    empty.write_bytes(b"")
    with pytest.raises(SourceError, match="empty.tar"):
        for _ in Pipeline(recipe("raise"), [str(empty)]):
            pass


def test_worker_error_reaches_main_process(tmp_path):
    torch = pytest.importorskip("torch")
    from patchloom.adapters.torch import PatchloomDataset

    shards, _, names = build(tmp_path)
    ds = PatchloomDataset(recipe("raise"), shards)
    loader = torch.utils.data.DataLoader(ds, batch_size=None, num_workers=1)
    with pytest.raises(SampleError) as info:  # torch rebuilds the worker's exception type
        for _ in loader:
            pass
    text = str(info.value)
    assert names["main"] in text and "trunc-jpg" in text and "stage decode" in text


def test_sample_before_a_cut_member_is_kept(tmp_path):
    _, _, names = build(tmp_path)
    pipe = Pipeline(recipe(), [names["cut"], names["tail"]])
    keys = [k for b in pipe for ks in b.keys for k in ks]
    assert pipe.ledger.shard_errors and "tail" in keys
    assert "cut-0" in keys
    # The sample the tar broke off in is skipped with a reason, not lost.
    skipped = {e.key: e for e in pipe.ledger.skipped}
    assert skipped["cut-1"].stage == "read" and "broke off" in skipped["cut-1"].reason
    led = pipe.ledger
    assert led.read == led.emitted + len(led.skipped)
