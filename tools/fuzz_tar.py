"""Fuzz the tar reader by hand: random tars (cuts at any byte, repeated names, odd member types,
huge declared sizes, long and non-UTF-8 names, flipped bytes, gzip) through `patchloom.read.read_shard`.

    python tools/fuzz_tar.py --cases 3000 --seed 0 --out fuzz-findings

Each case must end with the records it should give and, where the tar is damaged, a SourceError;
nothing else may escape. Undamaged and cleanly cut tars are checked against a model built from
what was written (the samples webdataset's rules make of it); flipped or oversized headers only
against the invariants. A finding is saved as `<out>/tar-case-<n>.tar` with a `.txt` note:

    python tools/fuzz_tar.py --replay fuzz-findings/tar-case-17.tar
"""

from __future__ import annotations

import argparse
import gzip
import io
import json
import signal
import sys
import tarfile
import tempfile
import traceback
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from patchloom.read import Record, ShardTask, SourceError, read_shard

HANG_S = 20  # a case still running after this long is a finding (the reader must always end)
EXTS = ("jpg", "png", "cls", "txt", "JPG", "Png", "tar.gz", "json")
ODD_KINDS = ("dir", "sym", "lnk", "fifo", "chr", "noext", "meta")
DAMAGES = ("none", "none", "cut", "cut", "boundary", "strip_end", "one_zero", "garbage_after",
           "second_tar", "flip", "huge_size", "gzip_cut")


@dataclass
class Entry:
    """One member as written: its name (may hold surrogate-escaped bytes), kind and data."""

    name: str
    kind: str = "reg"
    data: bytes = b""
    start: int = 0  # offset of its first header block
    header_end: int = 0  # offset just after its header blocks (pax / long-name ones included)


@dataclass
class Case:
    """A tar made by `make_case`, with what reading it must give."""

    data: bytes
    entries: list[Entry]
    damage: str
    cut: int | None = None  # byte the plain tar was cut at
    end: int = 0  # offset of the end-of-archive blocks in the plain tar
    options: dict = field(default_factory=dict)  # read_shard keywords (start, wanted, max_sample_bytes)
    part: tuple[int, int] = (0, 1)


def _escaped(name: str) -> str:
    return name.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def _key_ext(name: str) -> tuple[str | None, str | None]:
    """webdataset's split (base_plus_ext, extension lower-cased), written out independently."""
    base = name.rsplit("/", 1)[-1]
    if "." not in base or base.startswith("."):
        return None, None
    head, _, ext = base.partition(".")
    return name[: len(name) - len(base)] + head, ext.lower()


def random_entries(rng: np.random.Generator) -> list[Entry]:
    out: list[Entry] = []
    for s in range(int(rng.integers(0, 8))):
        style = rng.random()
        key = (f"dir{s}/" + "n" * int(rng.integers(90, 200)) if style < 0.1
               else b"s\xff\xe9".decode("utf-8", "surrogateescape") + str(s) if style < 0.2 else f"s{s}")
        exts = rng.choice(EXTS, size=int(rng.integers(1, 4)), replace=False)
        for ext in exts:
            size = 0 if rng.random() < 0.1 else int(rng.integers(1, 1500))
            out.append(Entry(f"{key}.{ext}", data=rng.bytes(size)))
            if rng.random() < 0.08:  # repeated name, sometimes differing in case only
                out.append(Entry(f"{key}.{ext.upper() if rng.random() < 0.5 else ext}", data=rng.bytes(8)))
        if rng.random() < 0.25:
            kind = str(rng.choice(ODD_KINDS))
            name = {"noext": f"plain{s}", "meta": f"__meta{s}__"}.get(kind, f"{key}.{rng.choice(EXTS)}")
            out.append(Entry(name, kind="reg" if kind in ("noext", "meta") else kind,
                             data=rng.bytes(int(rng.integers(0, 40))) if kind in ("noext", "meta") else b""))
    return out


def write_tar(entries: list[Entry], fmt: int) -> tuple[bytes, int]:
    """(tar bytes with end blocks and padding, offset of the end blocks); fills Entry offsets."""
    kinds = {"dir": tarfile.DIRTYPE, "sym": tarfile.SYMTYPE, "lnk": tarfile.LNKTYPE, "fifo": tarfile.FIFOTYPE,
             "chr": tarfile.CHRTYPE}
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w", format=fmt, encoding="utf-8", errors="surrogateescape") as tar:
        for e in entries:
            info = tarfile.TarInfo(e.name)
            info.mtime = 0
            if e.kind == "reg":
                info.size = len(e.data)
            else:
                info.type, info.linkname = kinds[e.kind], "target.jpg"
            e.start = tar.offset
            tar.addfile(info, io.BytesIO(e.data) if e.kind == "reg" else None)
            e.header_end = tar.offset - ((len(e.data) + 511) // 512 * 512 if e.kind == "reg" else 0)
        end = tar.offset
    return buf.getvalue(), end


def make_case(rng: np.random.Generator) -> Case:
    entries = random_entries(rng)
    fmt = int(rng.choice([tarfile.GNU_FORMAT, tarfile.PAX_FORMAT, tarfile.USTAR_FORMAT]))
    try:
        data, end = write_tar(entries, fmt)
    except ValueError:  # ustar cannot hold some long names
        data, end = write_tar(entries, tarfile.GNU_FORMAT)
    damage = str(rng.choice(DAMAGES))
    case = Case(data, entries, damage, end=end)
    if damage == "cut":
        case.cut = int(rng.integers(0, len(data) + 1))
    elif damage == "boundary":
        case.cut = int(rng.choice([e.start for e in entries] + [end]))
    elif damage == "strip_end":
        case.cut = end
    elif damage == "one_zero":
        case.cut = end + 512
    elif damage == "garbage_after":
        case.data = data + b"\x01" + rng.bytes(int(rng.integers(0, 600)))
    elif damage == "second_tar":
        case.data = data + write_tar([Entry("zz.jpg", data=b"z")], tarfile.GNU_FORMAT)[0]
    elif damage == "flip":
        flipped = bytearray(data)
        for pos in rng.integers(0, max(1, min(len(data), end + 1024)), size=int(rng.integers(1, 6))):
            flipped[int(pos)] ^= 1 << int(rng.integers(0, 8))
        case.data = bytes(flipped)
    elif damage == "huge_size":  # a member whose header declares far more than the tar holds
        info = tarfile.TarInfo("huge.jpg")
        info.size = int(rng.choice([1 << 33, 10**12, 8**11 - 1, 1 << 62]))
        at = int(rng.choice([e.start for e in entries] + [end]))
        header = info.tobuf(int(rng.choice([tarfile.GNU_FORMAT, tarfile.PAX_FORMAT])), "utf-8", "surrogateescape")
        case.data = data[:at] + header + rng.bytes(int(rng.integers(0, 3000))) + data[at:]
    if case.cut is not None:
        case.data = case.data[: case.cut]
    if damage == "gzip_cut" or rng.random() < 0.15:
        case.data = gzip.compress(case.data, compresslevel=1, mtime=0)
        if damage == "gzip_cut":
            case.data = case.data[: int(rng.integers(0, len(case.data)))]
    if rng.random() < 0.3:
        parts = int(rng.integers(1, 4))
        case.part = (int(rng.integers(0, parts)), parts)
    if rng.random() < 0.2:
        case.options["start"] = int(rng.integers(0, 5))
    if rng.random() < 0.15:
        case.options["wanted"] = {int(i) for i in rng.integers(0, 8, size=int(rng.integers(1, 4)))}
    if rng.random() < 0.3:
        case.options["max_sample_bytes"] = int(rng.integers(1, 3000))
    return case


@dataclass
class Expected:
    key: str
    index: int
    members: dict[str, bytes]
    error: bool
    first_end: int  # offset just after the header blocks of its first member (the reader has begun it)
    last_end: int  # offset just after the header of the member that proves the sample is complete


def model(case: Case) -> list[Expected]:
    """The records the tar as written holds (before cuts), selection and size limit applied."""
    limit = case.options.get("max_sample_bytes")
    samples: list[Expected] = []
    for e in case.entries:
        if e.kind != "reg" or e.name.startswith("__") and (e.name.endswith("__") or "__/" in e.name):
            continue
        key, ext = _key_ext(_escaped(e.name))
        if key is None:
            continue
        if samples and samples[-1].key == key:
            cur = samples[-1]
        else:
            if samples:
                samples[-1].last_end = e.header_end  # the next sample's first header closes it
            cur = Expected(key, len(samples), {}, False, e.header_end, 1 << 62)
            samples.append(cur)
        if cur.error:
            continue
        over = limit is not None and sum(map(len, cur.members.values())) + len(e.data) > limit
        if ext in cur.members or over:
            cur.error, cur.members = True, {}
            continue
        cur.members[ext] = e.data
    if samples:
        samples[-1].last_end = case.end + 512  # closed by the end-of-archive block
    part, parts = case.part
    start, wanted = case.options.get("start", 0), case.options.get("wanted")
    return [s for s in samples if s.index >= start and s.index % parts == part and (wanted is None or s.index in wanted)]


def check(case: Case, records: list[Record], failure: Exception | None) -> None:
    """Raise AssertionError where the outcome breaks an invariant or the model."""
    last = -1
    for rec in records:
        assert isinstance(rec, Record), type(rec)
        assert rec.index > last, f"indices not increasing: {rec.index} after {last}"
        last = rec.index
        json.dumps(rec.key)
        rec.key.encode("utf-8")
        part, parts = case.part
        assert rec.index % parts == part and rec.index >= case.options.get("start", 0), rec.index
        if rec.error is not None:
            assert rec.members == {} and isinstance(rec.error, str) and rec.error, rec
        else:
            assert rec.members and all(isinstance(v, bytes) for v in rec.members.values()), rec
            assert all(ext == ext.lower() for ext in rec.members), rec.members
            limit = case.options.get("max_sample_bytes")
            assert limit is None or sum(map(len, rec.members.values())) <= limit, rec.key
    if case.damage in ("flip", "huge_size", "gzip_cut"):
        if case.damage == "gzip_cut":
            assert failure is not None or "wanted" in case.options, "a cut gzip stream read as whole"
        return
    want = model(case)
    cut = case.cut if case.cut is not None else 1 << 62
    if "wanted" not in case.options:  # without an early stop, the whole tar is accounted for
        clean_end = cut >= case.end + 512 and case.damage != "second_tar"  # garbage after the end: ignored
        assert (failure is None) == clean_end, f"damage {case.damage}, cut {case.cut}: {failure!r}"
        # Every sample the reader began comes out; one not proven whole before the cut is an error.
        want = [s for s in want if s.first_end <= cut]
        assert len(records) == len(want), f"{len(records)} records, {len(want)} samples begun before the cut"
        for s in want:
            s.error = s.error or s.last_end > cut
    elif failure is None:  # it stopped after the last wanted sample, or at a clean end: all are there
        assert len(records) == len(want), f"{len(records)} records, {len(want)} wanted samples in the tar"
    for i, rec in enumerate(records):
        assert i < len(want), f"record {rec.key!r} #{rec.index} is not in the tar"
        exp = want[i]
        assert (rec.key, rec.index) == (exp.key, exp.index), ((rec.key, rec.index), (exp.key, exp.index))
        # With `wanted` the reader may stop early, so only the last record may be the broken one.
        broken = "wanted" in case.options and failure is not None and i == len(records) - 1 and exp.last_end > cut
        assert (rec.error is not None) == exp.error or broken and rec.error is not None, (rec.key, rec.error)
        if rec.error is None:
            assert rec.members == exp.members, rec.key


def run_case(case: Case) -> str:
    """Read the case from a temporary file; return the outcome, raise AssertionError on a finding."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "case.tar"
        path.write_bytes(case.data)
        task = ShardTask(str(path), *case.part)
        records: list[Record] = []
        failure: Exception | None = None
        try:
            for rec in read_shard(task, **case.options):
                records.append(rec)
        except SourceError as exc:
            failure = exc
            assert str(path) in str(exc), f"the error does not name the shard: {exc}"
    check(case, records, failure)
    return f"{case.damage}: " + ("error" if failure else "ok")


class _Hang(Exception):
    pass


def _alarm(signum, frame):
    raise _Hang(f"case still running after {HANG_S} s")


def fuzz(cases: int, seed: int, out: Path | None = None) -> tuple[Counter, list[str]]:
    """Run `cases` random tars; returns (outcome counts, findings). Findings are saved under `out`."""
    rng = np.random.default_rng(seed)
    outcomes: Counter[str] = Counter()
    findings: list[str] = []
    can_alarm = hasattr(signal, "SIGALRM")
    old = signal.signal(signal.SIGALRM, _alarm) if can_alarm else None
    try:
        for n in range(cases):
            case = make_case(rng)
            if can_alarm:
                signal.alarm(HANG_S)
            try:
                outcomes[run_case(case)] += 1
            except Exception:  # noqa: BLE001 (the finding: a broken invariant, a leaked error, a hang)
                outcomes[f"FINDING {case.damage}"] += 1
                note = f"seed {seed}, case {n}, damage {case.damage}, part {case.part}, options {case.options}\n"
                findings.append(note + traceback.format_exc())
                if out is not None:
                    out.mkdir(parents=True, exist_ok=True)
                    (out / f"tar-case-{n}.tar").write_bytes(case.data)
                    (out / f"tar-case-{n}.txt").write_text(findings[-1])
            finally:
                if can_alarm:
                    signal.alarm(0)
    finally:
        if can_alarm:
            signal.signal(signal.SIGALRM, old)
    return outcomes, findings


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cases", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", type=Path, default=Path("fuzz-findings"))
    ap.add_argument("--replay", type=Path, help="read one saved tar and show its records or error")
    args = ap.parse_args(argv)
    if args.replay:
        try:
            for rec in read_shard(ShardTask(str(args.replay))):
                print(rec.index, repr(rec.key), rec.error or sorted(rec.members))
        except SourceError as exc:
            print(f"{type(exc).__name__}: {exc}")
        return 0
    outcomes, findings = fuzz(args.cases, args.seed, args.out)
    print(f"{args.cases} cases, seed {args.seed}")
    for outcome, count in sorted(outcomes.items(), key=lambda kv: (-kv[1], kv[0])):
        print(f"{count:6d}  {outcome}")
    if findings:
        print(f"{len(findings)} findings saved under {args.out}/ (replay with --replay FILE); first:\n{findings[0]}")
    return 1 if findings else 0


if __name__ == "__main__":
    sys.exit(main())
