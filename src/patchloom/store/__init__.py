"""Pre-packed shards: run a recipe once, write its packed batches to tar shards with a manifest, and
stream them back with no re-processing.

Modules, one job each: `format` (names, batch codec, hashes), `manifest` (build, load and check the
untrusted manifest), `inputs` (the input shards and their hashes), `jobs` (one worker group's work),
`engine_local` and `engine_ray` (where the groups run), `writer` (`pack_to_dir`), `reader`
(`PackedReader`, `read_packed`), `verify` (`verify_dir`) and `command` (`patchloom pack` / `verify`).
"""

from .format import FORMAT, FORMAT_VERSION, GROUPS, MANIFEST, StoreError, batch_digests
from .manifest import load_manifest
from .reader import PackedReader, read_packed
from .verify import VerifyResult, verify_dir
from .writer import ENGINES, pack_to_dir

__all__ = [
    "ENGINES",
    "FORMAT",
    "FORMAT_VERSION",
    "GROUPS",
    "MANIFEST",
    "PackedReader",
    "StoreError",
    "VerifyResult",
    "batch_digests",
    "load_manifest",
    "pack_to_dir",
    "read_packed",
    "verify_dir",
]
