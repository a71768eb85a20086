"""The per-sample shortcuts (tar headers read without tarfile, cached grids and coords) give exactly
what the long way gives, and never let through a header tarfile would refuse."""

from __future__ import annotations

import io
import tarfile

import numpy as np
import pytest

from patchloom.image.patches import grid_coords
from patchloom.image.sizing import _best_grid, best_grid
from patchloom.read.tar import _plain_header


def _headers(fmt: int) -> list[bytes]:
    """The header blocks tarfile writes for a few regular files (long, prefixed, non-UTF-8 names)."""
    names = ["a/k-000001.jpg", "k.cls", "d" * 90 + "/" + "e" * 60 + ".png", "caf\udce9.txt", "x" * 99]
    out = []
    for i, name in enumerate(names):
        info = tarfile.TarInfo(name)
        info.size = 1000 * i + 7
        info.mtime = 1_700_000_000 + i
        info.mode = 0o644
        buf = io.BytesIO()
        try:
            block = info.tobuf(fmt, "utf-8", "surrogateescape")
        except ValueError:  # a name this format cannot hold
            continue
        buf.write(block)
        out.append(buf.getvalue()[-512:] if fmt != tarfile.USTAR_FORMAT else block[:512])
    return out


def _long_way(buf: bytes) -> tuple[str, bytes, int] | None:
    try:
        info = tarfile.TarInfo.frombuf(buf, "utf-8", "surrogateescape")
    except tarfile.HeaderError:
        return None
    return info.name, info.type, info.size


@pytest.mark.parametrize("fmt", [tarfile.USTAR_FORMAT, tarfile.GNU_FORMAT, tarfile.PAX_FORMAT])
def test_plain_header_reads_what_tarfile_reads(fmt: int) -> None:
    headers = _headers(fmt)
    assert headers
    for buf in headers:
        fast = _plain_header(buf)
        assert fast is not None, buf[:100]
        assert fast == _long_way(buf)


def test_plain_header_never_accepts_what_tarfile_refuses_or_reads_otherwise() -> None:
    rng = np.random.default_rng(16)
    base = _headers(tarfile.USTAR_FORMAT) + _headers(tarfile.GNU_FORMAT)
    taken = 0
    for trial in range(4000):
        buf = bytearray(base[trial % len(base)])
        for _ in range(int(rng.integers(1, 4))):
            pos = int(rng.integers(0, 512))
            buf[pos] = int(rng.choice([0, 32, 48, 55, 56, 47, 128, 255, int(rng.integers(0, 256))]))
        if trial % 3:  # keep the checksum right, so the other fields decide
            buf[148:156] = b"        "
            buf[148:156] = b"%06o\0 " % (sum(buf))
        fast = _plain_header(bytes(buf))
        if fast is not None:
            taken += 1
            assert fast == _long_way(bytes(buf)), bytes(buf)
    assert taken > 100  # the mutations left many headers plain: the comparison was made


def test_plain_header_leaves_other_types_to_tarfile() -> None:
    info = tarfile.TarInfo("dir/")
    info.type = tarfile.DIRTYPE
    assert _plain_header(info.tobuf(tarfile.USTAR_FORMAT)) is None
    info = tarfile.TarInfo("olddir/")  # an old-style directory: tarfile reads a type-NUL "file/" as one
    info.type = tarfile.AREGTYPE
    buf = info.tobuf(tarfile.USTAR_FORMAT)
    assert _long_way(buf) == ("olddir", tarfile.DIRTYPE, 0)
    assert _plain_header(buf) in (None, _long_way(buf))
    info = tarfile.TarInfo("big.bin")
    info.size = 8 ** 11 + 5  # over the octal field: base-256 in GNU format
    buf = info.tobuf(tarfile.GNU_FORMAT)
    assert _plain_header(buf) is None and _long_way(buf) == ("big.bin", tarfile.REGTYPE, 8 ** 11 + 5)


def test_best_grid_cache_gives_the_uncached_answer() -> None:
    rng = np.random.default_rng(3)
    for _ in range(300):
        h, w = (int(v) for v in rng.integers(1, 4000, size=2))
        hi = int(rng.integers(1, 400))
        lo = int(rng.integers(1, hi + 1))
        assert best_grid(h / w, lo, hi) == _best_grid.__wrapped__(h / w, lo, hi)
        assert best_grid(h / w, lo, hi) == _best_grid.__wrapped__(h / w, lo, hi)  # from the cache
    with pytest.raises(ValueError, match="lo <= hi"):
        best_grid(1.0, 5, 4)


def test_grid_coords_are_fresh_arrays() -> None:
    a = grid_coords(3, 4)
    a[0] = (9, 9)
    b = grid_coords(3, 4)
    assert b.flags.writeable and b.dtype == np.int32
    assert b.tolist() == [[r, c] for r in range(3) for c in range(4)]
