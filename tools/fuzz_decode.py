"""Fuzz the decode path by hand: mutate valid JPEG/PNG bytes, run each through process_record.

    python tools/fuzz_decode.py --examples 3000 --seed 0 --out fuzz-findings

Every case must give a PatchSet with a valid grid within the budget, or a SampleError. Anything
else (another exception type, an invalid PatchSet, a case slower than --slow seconds) is saved as
`<out>/case-<n>.<ext>` with a `.txt` note, so it can be replayed:

    python tools/fuzz_decode.py --replay fuzz-findings/case-17.jpg
"""

from __future__ import annotations

import argparse
import io
import sys
import time
import traceback
from collections import Counter
from pathlib import Path

import numpy as np
from PIL import Image

from patchloom import PatchSet, Recipe, SampleError
from patchloom.ledger import gist
from patchloom.image.chain import process_record
from patchloom.read import Record


def seed_images(rng: np.random.Generator) -> list[tuple[str, bytes]]:
    out = []
    for h, w in ((40, 56), (17, 9), (64, 64)):
        arr = rng.integers(0, 256, (h, w, 3), dtype=np.uint8)
        arr[: h // 2] //= 3
        img = Image.fromarray(arr)
        for fmt, ext, im, kw in (
            ("JPEG", "jpg", img, {"quality": 85}),
            ("JPEG", "jpg", img, {"quality": 60, "progressive": True}),
            ("JPEG", "jpg", img.convert("CMYK"), {}),
            ("JPEG", "jpg", img.convert("L"), {}),
            ("PNG", "png", img, {}),
            ("PNG", "png", img.convert("P"), {"transparency": 3}),
            ("PNG", "png", img.convert("LA"), {}),
            ("PNG", "png", img.convert("RGBA"), {}),
        ):
            buf = io.BytesIO()
            im.save(buf, format=fmt, **kw)
            out.append((ext, buf.getvalue()))
    return out


def mutate(data: bytes, seeds: list[tuple[str, bytes]], rng: np.random.Generator) -> bytes:
    buf = bytearray(data)
    for _ in range(int(rng.integers(1, 6))):
        n = len(buf)
        if n == 0:
            buf += rng.bytes(int(rng.integers(1, 9)))
            continue
        pos = int(rng.integers(0, n))
        op = rng.choice(["flip", "truncate", "splice", "insert", "overwrite", "repeat"])
        if op == "flip":
            buf[pos] ^= 1 << int(rng.integers(0, 8))
        elif op == "truncate":
            del buf[pos:]
        elif op == "splice":
            other = seeds[int(rng.integers(len(seeds)))][1]
            a = int(rng.integers(0, len(other)))
            b = min(len(other), a + int(rng.integers(0, 513)))
            buf[pos:pos + int(rng.integers(0, 65))] = other[a:b]
        elif op == "insert":
            buf[pos:pos] = rng.bytes(int(rng.integers(1, 17)))
        elif op == "overwrite":
            buf[pos:pos + 2] = [b"\xff\xff", b"\x00\x00", b"\x7f\xff", b"\xff\xd9", b"\xff\xda"][int(rng.integers(5))]
        else:  # repeat a chunk of the file (duplicated markers / chunks)
            b = min(n, pos + int(rng.integers(1, 257)))
            buf[b:b] = buf[pos:b]
    return bytes(buf)


def run_case(ext: str, data: bytes, recipe: Recipe, max_tokens: int, patch: int) -> str:
    """'ok', 'skip <stage>: <gist>', or raises (unexpected)."""
    rec = Record(key="fuzz", url="mem://fuzz.tar", index=0, members={ext: data})
    try:
        ps = process_record(rec, recipe, 0)
    except SampleError as err:
        return f"skip {err.stage}: {gist(err.cause)}"
    if not isinstance(ps, PatchSet):
        raise AssertionError(f"returned {type(ps).__name__}, not a PatchSet")
    gh, gw = ps.grid
    if not (gh >= 1 and gw >= 1 and gh * gw <= max_tokens):
        raise AssertionError(f"grid {ps.grid} outside the budget of {max_tokens}")
    if ps.patches.shape != (gh * gw, patch * patch * 3):
        raise AssertionError(f"patches {ps.patches.shape} do not fit grid {ps.grid}")
    return "ok"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--examples", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", type=Path, default=Path("fuzz-findings"))
    ap.add_argument("--pixel-limit", type=int, default=64_000_000, help="decode.pixel_limit (recipe default)")
    ap.add_argument("--max-tokens", type=int, default=64)
    ap.add_argument("--patch", type=int, default=8)
    ap.add_argument("--slow", type=float, default=2.0, help="seconds after which a case counts as a finding")
    ap.add_argument("--replay", type=Path, help="run one saved case and show its outcome")
    args = ap.parse_args(argv)
    recipe = Recipe.from_dict({"seed": 0, "decode": {"pixel_limit": args.pixel_limit},
                               "sizing": {"patch_size": args.patch, "max_tokens": args.max_tokens},
                               "output": {"dtype": "uint8"}})
    if args.replay:
        print(run_case(args.replay.suffix.lstrip("."), args.replay.read_bytes(), recipe, args.max_tokens, args.patch))
        return 0

    rng = np.random.default_rng(args.seed)
    seeds = seed_images(rng)
    outcomes: Counter[str] = Counter()
    findings = 0
    slowest = (0.0, -1)
    t_start = time.perf_counter()
    for n in range(args.examples):
        ext, base = seeds[int(rng.integers(len(seeds)))]
        data = mutate(base, seeds, rng)
        t0 = time.perf_counter()
        problem = None
        try:
            outcome = run_case(ext, data, recipe, args.max_tokens, args.patch)
        except Exception as exc:  # the finding: anything that is not a SampleError
            outcome = f"UNEXPECTED {type(exc).__name__}"
            problem = traceback.format_exc()
        elapsed = time.perf_counter() - t0
        slowest = max(slowest, (elapsed, n))
        if problem is None and elapsed > args.slow:
            outcome, problem = f"SLOW (> {args.slow} s)", f"{elapsed:.2f} s; outcome {outcome}"
        outcomes[outcome] += 1
        if problem is not None:
            findings += 1
            args.out.mkdir(parents=True, exist_ok=True)
            (args.out / f"case-{n}.{ext}").write_bytes(data)
            (args.out / f"case-{n}.txt").write_text(
                f"seed {args.seed}, case {n}, {len(data)} bytes, {elapsed:.3f} s\n{problem}")
    total = time.perf_counter() - t_start
    print(f"{args.examples} cases, seed {args.seed}, {total:.1f} s; slowest case {slowest[1]}: {slowest[0]:.3f} s")
    for outcome, count in sorted(outcomes.items(), key=lambda kv: (-kv[1], kv[0])):
        print(f"{count:6d}  {outcome}")
    if findings:
        print(f"{findings} findings saved under {args.out}/ (replay with --replay FILE)")
    return 1 if findings else 0


if __name__ == "__main__":
    sys.exit(main())
