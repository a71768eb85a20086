"""Random tars through `read_shard` (tools/fuzz_tar.py): only SourceError escapes, every record is
whole or an error, and undamaged or cleanly cut tars give exactly the samples written."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest

from patchloom.read import Record

_TOOL = Path(__file__).resolve().parents[1] / "tools" / "fuzz_tar.py"
_spec = importlib.util.spec_from_file_location("fuzz_tar", _TOOL)
fuzz_tar = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("fuzz_tar", fuzz_tar)  # its dataclasses look their module up there
_spec.loader.exec_module(fuzz_tar)


def test_random_tars_give_records_or_shard_errors_only():
    outcomes, findings = fuzz_tar.fuzz(300, seed=20240611)
    assert not findings, findings[0]
    assert sum(outcomes.values()) == 300
    kinds = {k.split(":")[0] for k in outcomes}
    assert {"none", "cut", "boundary", "flip", "huge_size", "gzip_cut"} <= kinds  # the damages were drawn
    assert any(k.endswith("error") for k in outcomes) and any(k.endswith("ok") for k in outcomes)


def test_the_checker_catches_a_lost_or_altered_sample():
    rng = np.random.default_rng(5)
    case = None
    while case is None or case.damage != "none" or not fuzz_tar.model(case) or case.options:
        case = fuzz_tar.make_case(rng)
    want = fuzz_tar.model(case)
    good = [Record(s.key, "x", s.index, s.members) if not s.error else Record(s.key, "x", s.index, {}, error="e")
            for s in want]
    fuzz_tar.check(case, good, None)
    with pytest.raises(AssertionError):
        fuzz_tar.check(case, good[:-1], None)  # a sample lost silently
    with pytest.raises(AssertionError):
        fuzz_tar.check(case, good, ValueError("cut off"))  # an error on a whole tar
    first = good[0]
    altered = Record(first.key, "x", first.index, {"jpg": b"other"}) if first.error is None else \
        Record(first.key, "x", first.index, {"jpg": b"x"})
    with pytest.raises(AssertionError):
        fuzz_tar.check(case, [altered] + good[1:], None)
