"""Mutated JPEG/PNG bytes through `process_record`: a valid PatchSet or a SampleError, nothing else.

Hypothesis flips bits, truncates, splices and inserts bytes into small valid images. The work of
each case is bounded by counts, not time: at most one decode, of an image whose header is within
`decode.pixel_limit`. The limit is kept small so a mutated header that claims a large size is
refused instead of decoding megapixels of garbage (that path is the pixel_limit test's job).
"""

from __future__ import annotations

import io
from unittest import mock

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from patchloom import PatchSet, Recipe, SampleError
from patchloom.image.chain import process_record
from patchloom.image.decode import OpenedImage, decode_path_counts
from patchloom.read import Record

MAX_TOKENS = 64
PATCH = 8
PIXEL_LIMIT = 4_000_000
RECIPE = Recipe.from_dict({
    "seed": 0,
    "sizing": {"patch_size": PATCH, "max_tokens": MAX_TOKENS},
    "decode": {"pixel_limit": PIXEL_LIMIT},
    "output": {"dtype": "uint8"},
})


def _seeds() -> list[tuple[str, bytes]]:
    rng = np.random.default_rng(11)
    arr = rng.integers(0, 256, (40, 56, 3), dtype=np.uint8)
    arr[:20] //= 3  # some structure, so the compressed streams are not pure noise
    out = []
    for fmt, ext, img, kw in (
        ("JPEG", "jpg", Image.fromarray(arr), {"quality": 85}),
        ("JPEG", "jpg", Image.fromarray(arr), {"quality": 70, "progressive": True}),
        ("PNG", "png", Image.fromarray(arr), {}),
        ("PNG", "png", Image.fromarray(arr).convert("P"), {"transparency": 3}),
        ("PNG", "png", Image.fromarray(arr[..., 0]).convert("LA"), {}),
    ):
        buf = io.BytesIO()
        img.save(buf, format=fmt, **kw)
        out.append((ext, buf.getvalue()))
    return out


SEEDS = _seeds()


@st.composite
def mutated(draw) -> tuple[str, bytes]:
    ext, data = draw(st.sampled_from(SEEDS))
    buf = bytearray(data)
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["flip", "truncate", "splice", "insert", "overwrite"]))
        n = len(buf)
        if n == 0:
            buf += draw(st.binary(min_size=1, max_size=8))
            continue
        pos = draw(st.integers(0, n - 1))
        if op == "flip":
            buf[pos] ^= 1 << draw(st.integers(0, 7))
        elif op == "truncate":
            del buf[pos:]
        elif op == "splice":  # a piece of another seed (or of itself) at pos
            _, other = draw(st.sampled_from(SEEDS))
            a = draw(st.integers(0, len(other) - 1))
            b = draw(st.integers(a, min(len(other), a + 512)))
            buf[pos:pos + draw(st.integers(0, 64))] = other[a:b]
        elif op == "insert":
            buf[pos:pos] = draw(st.binary(min_size=1, max_size=16))
        else:  # overwrite with extreme values (sizes, lengths, counts)
            buf[pos:pos + 2] = draw(st.sampled_from([b"\xff\xff", b"\x00\x00", b"\x7f\xff", b"\xff\xd9"]))
    return ext, bytes(buf)


def check_case(ext: str, data: bytes) -> str:
    rec = Record(key="fuzz", url="mem://fuzz.tar", index=0, members={ext: data})
    decoded: list[int] = []  # stored pixels of each image decoded
    real_decode = OpenedImage.decode

    def counted(self, **kw):
        decoded.append(self.width * self.height)
        return real_decode(self, **kw)

    paths_before = sum(decode_path_counts().values())
    try:
        with mock.patch.object(OpenedImage, "decode", counted):
            ps = process_record(rec, RECIPE, 0)
    except SampleError as err:
        outcome = f"skip:{err.stage}"
    else:
        assert isinstance(ps, PatchSet)
        gh, gw = ps.grid
        assert gh >= 1 and gw >= 1 and gh * gw <= MAX_TOKENS
        assert ps.patches.shape == (gh * gw, PATCH * PATCH * 3) and ps.patches.dtype == np.uint8
        assert ps.coords.min() >= 0 and (ps.coords.max(axis=0) < np.array([gh, gw])).all()
        outcome = "ok"
    # Work bounded by counts: one decode at most, never of a header over the pixel limit.
    assert len(decoded) <= 1 and all(p <= PIXEL_LIMIT for p in decoded), (decoded, len(data), ext)
    assert sum(decode_path_counts().values()) - paths_before == len(decoded)  # no decode around the count
    return outcome


def test_seeds_are_valid():
    for ext, data in SEEDS:
        assert check_case(ext, data) == "ok"


@settings(max_examples=200, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(mutated())
def test_mutated_bytes_give_patches_or_sample_error(case):
    check_case(*case)
