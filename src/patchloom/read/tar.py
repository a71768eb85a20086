"""The streaming tar reader: raw records (key, shard URL, index, member bytes) from one tar shard.

Tar shards are read by a small streaming reader of our own (`_TarReader`): it splits member names
into key and extension as webdataset does, but also notices what a plain tar walk lets pass: a tar
cut off at a member boundary (no end-of-archive blocks), a `pipe:` command that failed, a member
name repeated within a sample, and a member whose header declares more bytes than the recipe
allows (streamed past, never loaded). Every failure of a shard is a ShardError naming it.
"""

from __future__ import annotations

import logging
import os
import re
import select
import subprocess
import tarfile
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field

from .specs import SHELL_PREFIXES, ShardTask, SourceError

log = logging.getLogger("patchloom")


class ShardError(SourceError):
    """One shard failed (unreachable, cut off, corrupt, or its command failed): a caller may skip it
    and read the others. A bad spec stays a plain SourceError. The message names the shard."""

    def __init__(self, message: str, url: str = "") -> None:
        super().__init__(message)
        self.url = url

    def __reduce__(self):  # keep `url` when the error crosses a process boundary (DataLoader workers)
        return (type(self), (str(self), self.url))


def shard_error(url: str, reason: str) -> ShardError:
    """A ShardError whose message starts with `shard {url}: `."""
    return ShardError(f"shard {url}: {reason}", url)


@dataclass(slots=True)
class Record:
    """One raw sample: its key, its shard URL, its index in the shard and its members' bytes."""

    key: str
    url: str
    index: int
    members: dict[str, bytes]
    error: str | None = None  # set when the shard broke off inside this sample: it is skipped, not lost


URL_TIMEOUT_S = 60.0  # seconds a stalled HTTP(S) connection may stay silent before the shard fails
PIPE_EXIT_TIMEOUT_S = 60.0  # seconds a `pipe:` command may take to exit once its output has ended
PIPE_STALL_TIMEOUT_S = 300.0  # seconds a `pipe:` command may stay silent before the shard fails


class _PipeStream:
    """The output of a `pipe:` command; its exit status is checked once the output has ended."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.command = url.removeprefix("pipe:")
        self._stderr = tempfile.TemporaryFile()  # a file, not a pipe: a chatty command cannot block on it
        # The caller allowed shell commands explicitly (allow_shell=True).
        self.proc = subprocess.Popen(self.command, shell=True, stdout=subprocess.PIPE,  # noqa: S602
                                     stderr=self._stderr, bufsize=0)
        self._fd = self.proc.stdout.fileno()  # type: ignore[union-attr]
        self.closed = False

    def read(self, n: int = -1) -> bytes:
        """Up to n bytes (all with n < 0), fewer only at the end of the output. A command silent for
        PIPE_STALL_TIMEOUT_S is a shard error, so a hung download cannot stall training forever."""
        chunks: list[bytes] = []
        need = n if n >= 0 else None
        while need is None or need > 0:
            ready, _, _ = select.select([self._fd], [], [], PIPE_STALL_TIMEOUT_S)
            if not ready:
                raise shard_error(self.url, f"the command {self.command!r} sent nothing for "
                                            f"{PIPE_STALL_TIMEOUT_S:.0f} s")
            chunk = os.read(self._fd, need if need is not None else 1 << 20)
            if not chunk:
                break
            chunks.append(chunk)
            if need is not None:
                need -= len(chunk)
        return b"".join(chunks)

    def seekable(self) -> bool:
        return False

    def check_exit(self) -> None:
        """Call after the output ended: a non-zero exit status raises ShardError naming the command."""
        try:
            status = self.proc.wait(timeout=PIPE_EXIT_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            raise shard_error(self.url, f"the command {self.command!r} closed its output but did not "
                                         f"exit within {PIPE_EXIT_TIMEOUT_S:.0f} s") from None
        if status != 0:
            raise shard_error(self.url, f"the command {self.command!r} exited with status {status}"
                                         f"{self._stderr_tail()}")

    def _stderr_tail(self, limit: int = 300) -> str:
        try:
            size = self._stderr.seek(0, os.SEEK_END)
            self._stderr.seek(max(0, size - limit))
            text = self._stderr.read().decode("utf-8", "replace").strip()
        except OSError:
            return ""
        return f" (stderr: {'...' if size > limit else ''}{text})" if text else ""

    def close(self) -> None:
        """Close the output; a command still running (we stopped early) is killed."""
        if self.closed:
            return
        self.closed = True
        self.proc.stdout.close()  # type: ignore[union-attr]
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        self._stderr.close()


def open_shard(url: str, *, allow_shell: bool = False):
    """A binary stream for a shard: local files directly, http(s) through urllib, `pipe:` commands
    (only when allowed), other schemes through webdataset's gopen. Failing to open is a ShardError."""
    if url.startswith(SHELL_PREFIXES):
        if not allow_shell:
            raise SourceError(f"refusing shell-command shard {url!r}; pass allow_shell=True (--allow-shell) "
                              "to allow it")
        try:
            return _PipeStream(url)
        except OSError as exc:
            raise shard_error(url, f"cannot start the command ({exc})") from exc
    if "://" not in url:
        try:
            return open(url.removeprefix("file:"), "rb")
        except OSError as exc:
            raise shard_error(url, f"cannot open ({exc.strerror or exc})") from exc
    scheme = url.split("://", 1)[0].lower()
    if scheme in ("http", "https"):
        import urllib.error
        import urllib.request

        try:
            return urllib.request.urlopen(url, timeout=URL_TIMEOUT_S)  # noqa: S310 (http/https only)
        except urllib.error.HTTPError as exc:
            raise shard_error(url, f"the server answered HTTP {exc.code} {exc.reason}") from exc
        except (urllib.error.URLError, OSError, ValueError) as exc:
            raise shard_error(url, f"cannot connect ({getattr(exc, 'reason', exc)})") from exc
    from webdataset.gopen import gopen  # a function (webdataset >= 0.2); imports torch when installed

    try:
        return gopen(url, "rb")
    except Exception as exc:  # noqa: BLE001 (any scheme handler's failure is this shard's failure)
        raise shard_error(url, f"cannot open ({exc}); for a store without a built-in reader, give a "
                                f"command as the shard, e.g. 'pipe:aws s3 cp {url} -', with allow_shell") from exc


# --------------------------------------------------------------------------- streaming tar reader

TAR_BLOCK = 512
_ZERO_BLOCK = bytes(TAR_BLOCK)
_READ_CHUNK = 16 << 20  # a member is read in pieces of at most this (a header may declare any size)
_SKIP_CHUNK = 1 << 20  # bytes streamed past are dropped in pieces of this
_META_LIMIT = 1 << 20  # pax and GNU long-name headers larger than this are refused (real ones: < 1 KiB)
_TRAILER_LIMIT = 1 << 20  # bytes looked at after the end-of-archive marker
# Member types (POSIX ustar typeflag) that carry no data blocks, as Python's tarfile reads them:
# hard link, symlink, character and block device, directory, FIFO.
_NO_DATA_TYPES = frozenset((b"1", b"2", b"3", b"4", b"5", b"6"))
_REGULAR_TYPES = frozenset((b"0", b"\0", b"7"))
_KEY_EXT = re.compile(r"^((?:.*/|)[^.]+)[.]([^/]*)$")  # webdataset's base_plus_ext: key up to the first dot
_META_NAME = re.compile(r"__[^/]*__($|/)")  # webdataset skips such names (shard-level metadata)
# Compressed-stream magic numbers, strict enough that no plain tar (which starts with a member
# name) is taken for one: gzip with deflate, bzip2 with its block header, xz.
_COMPRESSED = (
    (re.compile(rb"\x1f\x8b\x08"), "gzip"),
    (re.compile(rb"BZh[1-9]1AY&SY", re.DOTALL), "bz2"),
    (re.compile(rb"\xfd7zXZ\x00"), "lzma"),
)


# A plain ustar octal number field: spaces, octal digits, spaces, then a NUL and anything (tarfile
# ignores what follows the NUL). Other forms (base-256, odd spacing) go through tarfile.
_OCTAL = re.compile(rb" *([0-7]*) *(?:\0[\x00-\xff]*)?")
# mode, uid, gid, size, mtime, devmajor, devminor, then the checksum (last).
_OCTAL_FIELDS = ((100, 108), (108, 116), (116, 124), (124, 136), (136, 148), (329, 337), (337, 345), (148, 156))


def _text(field: bytes) -> str:
    """A NUL-terminated header text field, decoded as tarfile decodes names (utf-8, surrogateescape)."""
    return field.split(b"\0", 1)[0].decode("utf-8", "surrogateescape")


def _plain_header(buf: bytes) -> tuple[str, bytes, int] | None:
    """(name, type, size) of a regular-file header read straight from its 512 bytes, exactly as
    tarfile.TarInfo.frombuf reads it but without building a TarInfo (a third of a small sample's
    read time); None for any other header (another type, base-256 or odd numbers, a checksum that
    only matches signed), which then goes through tarfile, which also judges it."""
    kind = buf[156:157]
    if kind != b"0" and kind != b"\0":
        return None
    digits = []
    for start, end in _OCTAL_FIELDS:
        match = _OCTAL.fullmatch(buf, start, end)
        if match is None:
            return None
        digits.append(match.group(1))
    if int(digits[-1] or b"0", 8) != 256 + sum(buf) - sum(buf[148:156]):
        return None
    name = _text(buf[0:100])
    if name.endswith("/"):  # tarfile turns some of these into directories
        return None
    prefix = _text(buf[345:500])
    if prefix:
        name = prefix + "/" + name
    return name, kind, int(digits[3] or b"0", 8)


def _escaped(name: str) -> str:
    """A member name decoded with surrogateescape -> a valid str, non-UTF-8 bytes as `\\xNN`."""
    return name.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def split_member_name(name: str) -> tuple[str | None, str | None]:
    """(key, extension) of a member name as webdataset splits it: key = path up to the first dot of
    the file name, extension = the rest, lower-cased; (None, None) for a name without a dot."""
    match = _KEY_EXT.match(name)
    if not match:
        return None, None
    return match.group(1), match.group(2).lower()


class _Chain:
    """A stream with some bytes already read from it put back in front."""

    def __init__(self, head: bytes, rest) -> None:
        self.head, self.rest = head, rest

    def read(self, n: int = -1) -> bytes:
        if not self.head:
            return self.rest.read(n)
        if n < 0:
            out, self.head = self.head + self.rest.read(), b""
            return out
        out, self.head = self.head[:n], self.head[n:]
        return out

    def readable(self) -> bool:
        return True


@dataclass(slots=True)
class _Member:
    name: str  # escaped (valid UTF-8)
    size: int
    regular: bool  # a regular file (others: directories, links, devices, unknown types)
    directory: bool = False


class _TarReader:
    """Walks the members of a tar stream (plain, gzip, bzip2 or xz) one header at a time, reading a
    member's data only when asked and streaming past the rest. Every failure is a ShardError."""

    def __init__(self, raw, url: str) -> None:
        self.url, self.raw = url, raw
        self.pos = 0  # bytes of the uncompressed tar consumed
        self.count = 0  # member headers read
        self.last = ""  # name of the last member header
        self._left = 0  # data + padding bytes of the current member not read yet
        self._eof = False  # the stream has been read to its end
        head = self._raw_head(10)
        kind = next((mod for magic, mod in _COMPRESSED if magic.match(head)), None)
        self._end: int | None = None  # file size when `raw` is a seekable plain file
        if kind is None:
            self._src = _Chain(head, raw)
            try:
                if raw.seekable():
                    self._end = os.fstat(raw.fileno()).st_size
            except (AttributeError, OSError, ValueError):
                self._end = None
        else:
            import bz2
            import gzip
            import lzma

            opener = {"gzip": lambda f: gzip.GzipFile(fileobj=f, mode="rb"), "bz2": bz2.BZ2File,
                      "lzma": lzma.LZMAFile}[kind]
            self._src = opener(_Chain(head, raw))

    def _raw_head(self, n: int) -> bytes:
        parts: list[bytes] = []
        got = 0
        while got < n:
            try:
                chunk = self.raw.read(n - got)
            except Exception as exc:  # noqa: BLE001 (any I/O failure of this shard)
                raise shard_error(self.url, f"read failed ({type(exc).__name__}: {exc})") from exc
            if not chunk:
                break
            parts.append(chunk)
            got += len(chunk)
        return b"".join(parts)

    # -- low-level reads: at most n bytes, fewer only at the end of the stream
    def _read(self, n: int) -> bytes:
        parts: list[bytes] = []
        got = 0
        while got < n and not self._eof:
            try:
                chunk = self._src.read(min(n - got, _READ_CHUNK))
            except Exception as exc:  # noqa: BLE001 (I/O, decompression: all are this shard's failure)
                raise self._error(f"reading byte {self.pos + got} failed ({type(exc).__name__}: {exc}); "
                                  "the shard is cut off or corrupt") from exc
            if not chunk:
                self._eof = True
                break
            parts.append(chunk)
            got += len(chunk)
        self.pos += got
        return parts[0] if len(parts) == 1 else b"".join(parts)

    def _skip(self, n: int) -> int:
        """Stream past n bytes without keeping them (a seek on a plain local file); returns how many."""
        if n <= 0:
            return 0
        if self._end is not None and not self._src.head:
            try:
                here = self.raw.tell()
                k = max(0, min(n, self._end - here))
                self.raw.seek(here + k)
            except (OSError, ValueError) as exc:
                raise self._error(f"seeking in the shard failed ({exc})") from exc
            self.pos += k
            if k < n:
                self._eof = True
            return k
        done = 0
        while done < n:
            got = len(self._read(min(n - done, _SKIP_CHUNK)))
            done += got
            if not got:
                break
        return done

    def _error(self, reason: str) -> ShardError:
        return shard_error(self.url, reason)

    def _where(self) -> str:
        if not self.count:
            return "before its first member"
        key, _ = split_member_name(self.last)
        return f"after member {self.count} / " + (f"key {key!r}" if key is not None else repr(self.last))

    def _cut(self, what: str) -> ShardError:
        """The stream ended early; a failed command is named as the cause when there is one."""
        cause = ""
        if isinstance(self.raw, _PipeStream):
            try:
                self.raw.check_exit()
            except ShardError as exc:
                cause = str(exc).removeprefix(f"shard {self.url}: ") + "; "
        if self.pos == 0 and not what:
            return self._error(f"{cause}the shard is empty (0 bytes): not a tar file")
        return self._error(f"{cause}{what or 'the shard ends without the tar end-of-archive blocks'}: "
                           f"it was cut off ({self._where()})")

    # -- members
    def next(self) -> _Member | None:
        """The next member, or None at the end-of-archive marker. The data of the previous member
        that was not read is streamed past first."""
        if self._left:
            left, self._left = self._left, 0
            if self._skip(left) < left:
                raise self._cut(f"unexpected end of data in member {self.last!r}")
        pax: dict[str, bytes] = {}
        long_name: str | None = None
        while True:
            at = self.pos
            buf = self._read(TAR_BLOCK)
            if not buf:
                raise self._cut("")
            if len(buf) < TAR_BLOCK:
                raise self._cut(f"the shard ends inside a tar header at byte {at}")
            if buf == _ZERO_BLOCK:
                # POSIX.1-2017, pax, "ustar Interchange Format": "At the end of the archive file there
                # shall be two 512-octet logical records filled with binary zeros, interpreted as an
                # end-of-archive indicator." Writers often pad further with zero blocks (to tar's
                # 10240-byte record). Like GNU tar and Python's tarfile we stop at the first zero
                # block, and require at least that one: a tar with none was cut off. A lone zero block
                # at the very end is accepted (every member before it is whole); `finish` checks
                # that no second tar follows.
                return None
            plain = _plain_header(buf)
            if plain is not None:
                header_name, kind, size = plain
            else:
                try:
                    info = tarfile.TarInfo.frombuf(buf, "utf-8", "surrogateescape")
                except Exception as exc:  # noqa: BLE001 (tarfile's header errors; any is a corrupt header)
                    what = "is not a tar file" if at == 0 else f"has a corrupt tar header at byte {at}"
                    raise self._error(f"the shard {what} ({exc}; {self._where()})") from exc
                header_name, kind, size = info.name, info.type, info.size
            if size < 0:
                raise self._error(f"the tar header at byte {at} declares a negative size ({size})")
            if kind in (b"x", b"X", b"g"):  # pax extended header (g: global, ignored)
                records = _parse_pax(self._meta(size, at, "pax header"), self, at)
                if kind != b"g":
                    pax.update(records)
                continue
            if kind in (b"L", b"K"):  # GNU long name / long link name
                data = self._meta(size, at, "GNU long-name header")
                if kind == b"L":
                    long_name = data.split(b"\0", 1)[0].decode("utf-8", "surrogateescape")
                continue
            name = header_name
            if long_name is not None:
                name = long_name
            if b"path" in pax:
                name = pax[b"path"].decode("utf-8", "surrogateescape")
            name = _escaped(name)
            if kind == b"S" or any(k.startswith(b"GNU.sparse.") for k in pax):
                raise self._error(f"member {name!r} at byte {at} is a GNU sparse file; patchloom reads "
                                  "plain members only (write the shard without --sparse)")
            if b"size" in pax:
                raw_size = pax[b"size"]
                if not raw_size.isdigit() or len(raw_size) > 20:
                    raise self._error(f"the pax header at byte {at} has a bad size {raw_size[:30]!r}")
                size = int(raw_size)
            has_data = kind not in _NO_DATA_TYPES
            self._left = (size + TAR_BLOCK - 1) // TAR_BLOCK * TAR_BLOCK if has_data else 0
            self.count += 1
            self.last = name
            return _Member(name=name, size=size if has_data else 0, regular=kind in _REGULAR_TYPES,
                           directory=kind == b"5")

    def _meta(self, size: int, at: int, what: str) -> bytes:
        if size > _META_LIMIT:
            raise self._error(f"the {what} at byte {at} declares {size} bytes (over {_META_LIMIT}): corrupt tar")
        padded = (size + TAR_BLOCK - 1) // TAR_BLOCK * TAR_BLOCK
        data = self._read(padded)
        if len(data) < padded:
            raise self._cut(f"unexpected end of data in the {what} at byte {at}")
        return data[:size]

    def read_data(self, member: _Member) -> bytes:
        """The current member's bytes (call after `next` returned it, at most once)."""
        data = self._read(member.size)
        if len(data) < member.size:
            self._left = 0
            raise self._cut(f"unexpected end of data in member {member.name!r}")
        self._left -= member.size
        return data

    def finish(self) -> None:
        """After the end marker: a second tar glued on after it would be lost silently, so a tar
        header in what follows is an error (other bytes there are ignored, as tar readers do: some
        writers leave garbage after the end). Then the exit status of a `pipe:` command."""
        tail_at, seen, scanning = self.pos, 0, True  # tail_at is block-aligned, chunks are whole blocks
        while seen <= _TRAILER_LIMIT:
            chunk = self._read(_SKIP_CHUNK)
            if not chunk:
                break
            if scanning and chunk.count(0) != len(chunk):
                off = (len(chunk) - len(chunk.lstrip(b"\0"))) // TAR_BLOCK * TAR_BLOCK
                if _is_tar_header(chunk[off:off + TAR_BLOCK]):
                    raise self._error(f"a tar member header follows the end-of-archive blocks (at byte "
                                      f"{tail_at + seen + off}); what follows is not read. Two tars joined "
                                      "into one file? Write each as its own shard")
                scanning = False
            seen += len(chunk)
        if self._eof and isinstance(self.raw, _PipeStream):
            self.raw.check_exit()


def _is_tar_header(block: bytes) -> bool:
    try:
        tarfile.TarInfo.frombuf(block, "utf-8", "surrogateescape")
    except Exception:  # noqa: BLE001 (not a valid header, whatever tarfile says is wrong with it)
        return False
    return True


def _parse_pax(data: bytes, reader: _TarReader, at: int) -> dict[bytes, bytes]:
    """Records `LEN key=value\\n` of a pax extended header."""
    out: dict[bytes, bytes] = {}
    pos = 0
    while pos < len(data) and data[pos:].strip(b"\0"):  # tolerate NUL padding after the last record
        space = data.find(b" ", pos, pos + 21)
        digits = data[pos:space] if space > pos else b""
        end = pos + int(digits) if digits.isdigit() else -1
        if end <= space or end > len(data) or data[end - 1:end] != b"\n" or b"=" not in data[space + 1:end]:
            raise reader._error(f"the pax header at byte {at} is malformed (record at offset {pos})")
        key, _, value = data[space + 1:end - 1].partition(b"=")
        out[key] = value
        pos = end
    return out


@dataclass(slots=True)
class _Sample:
    """A sample being read: the members so far, or the reason it is skipped."""

    key: str
    index: int
    keep: bool
    members: dict[str, bytes] = field(default_factory=dict)
    names: dict[str, str] = field(default_factory=dict)  # extension -> member name
    size: int = 0
    error: str | None = None

    def record(self, url: str) -> Record:
        if self.error is not None:
            return Record(self.key, url, self.index, {}, error=self.error)
        return Record(self.key, url, self.index, self.members)

    def broken(self, url: str, exc: Exception) -> Record:
        reason = str(exc).removeprefix(f"shard {url}: ")
        return Record(self.key, url, self.index, {}, error=f"shard broke off inside this sample ({reason})")


def read_shard(
    task: ShardTask,
    *,
    allow_shell: bool = False,
    start: int = 0,
    wanted: set[int] | None = None,
    max_sample_bytes: int | None = None,
) -> Iterator[Record]:
    """Records of one shard task, in tar order, with their index within the shard.

    Samples before `start`, of other readers' parts, or (when given) not in `wanted` are skipped by
    file name, so their bytes are never copied out of the tar stream (cheap resume and splits).
    A sample with a repeated member, or over `max_sample_bytes` by its tar headers (the bytes are
    streamed past, never loaded), comes out as a Record with `error` set and reading goes on. A
    shard that is cut off (no end-of-archive blocks), corrupt, unreachable or whose `pipe:` command
    fails raises ShardError, after the sample it broke off in came out as an error Record.
    """
    if wanted is not None and not wanted:
        return
    last_wanted = max(wanted) if wanted is not None else None
    url = task.url
    raw = open_shard(url, allow_shell=allow_shell)
    try:
        reader = _TarReader(raw, url)
        sample: _Sample | None = None
        index = -1
        unread: list[str] = []  # the first few strays' names, shortened, for the warning
        strays = 0
        while True:
            try:
                member = reader.next()
            except ShardError as exc:
                if sample is not None and sample.keep:
                    yield sample.broken(url, exc)
                raise
            if member is None:
                break
            if member.directory or _META_NAME.match(member.name) or (
                    "/" not in member.name and member.name.startswith("__") and member.name.endswith("__")):
                continue
            key, ext = split_member_name(member.name)
            if not member.regular or key is None or ext is None:
                strays += 1  # a link or device, or no extension: part of no sample (as webdataset)
                if len(unread) < 5:
                    name = member.name
                    unread.append(repr(name if len(name) <= 120 else name[:100] + "..." + name[-17:]))
                continue
            if sample is None or key != sample.key:
                if sample is not None and sample.keep:
                    yield sample.record(url)
                index += 1
                if last_wanted is not None and index > last_wanted:
                    return
                keep = index >= start and index % task.parts == task.part and (wanted is None or index in wanted)
                sample = _Sample(key, index, keep)
            if not sample.keep or sample.error is not None:
                continue  # streamed past by the next `next()`
            if ext in sample.names:
                sample.error = (f"duplicated member {ext!r} in sample {key!r} (members {sample.names[ext]!r} and "
                                f"{member.name!r}); the sample is skipped, the rest of the shard is read")
                sample.members = {}
                continue
            sample.names[ext] = member.name
            if max_sample_bytes is not None and sample.size + member.size > max_sample_bytes:
                sample.error = _oversize(sample, member, max_sample_bytes)
                sample.members = {}
                continue
            try:
                data = reader.read_data(member)
            except ShardError as exc:
                yield sample.broken(url, exc)
                raise
            sample.members[ext] = data
            sample.size += len(data)
        if sample is not None and sample.keep:
            yield sample.record(url)
        reader.finish()
        if strays and task.part == 0 and start == 0 and wanted is None:  # one reader of the shard says it
            log.warning("shard %s: %d member(s) belong to no sample and were not read: %s; a sample's members are "
                        "regular files named KEY.EXT (links are not followed)", url, strays,
                        ", ".join(unread) + (", ..." if strays > len(unread) else ""))
    finally:
        try:
            raw.close()
        except Exception:  # noqa: BLE001 (closing after a failure or an early stop: nothing left to report)
            pass


def _oversize(sample: _Sample, member: _Member, limit: int) -> str:
    advice = "raise it in the recipe if such samples are expected"
    if member.size > limit:
        return f"member {member.name!r} is {member.size} bytes, over source.max_sample_bytes={limit}; {advice}"
    total = sample.size + member.size
    return (f"sample {sample.key!r} reaches {total} bytes with member {member.name!r} ({member.size} bytes), "
            f"over source.max_sample_bytes={limit}; {advice}")

