"""End to end: demo shards -> Pipeline -> torch DataLoader with 0 and 2 workers."""

from __future__ import annotations

import tarfile
from collections import Counter

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="the torch extra is not installed")
from torch.utils.data import DataLoader  # noqa: E402

from patchloom import Recipe  # noqa: E402
from patchloom.adapters.torch import PatchloomDataset  # noqa: E402
from patchloom.demo.data import DEMO_CORRUPT_KEYS, demo_shard_pattern  # noqa: E402

RECIPE = {"seed": 3, "source": {"shuffle_buffer": 16},
          "sizing": {"patch_size": 16, "max_tokens": 128, "min_tokens": 4, "max_aspect": 8.0},
          "packing": {"seq_len": 512, "rows": 2, "max_images_per_row": 12, "lookahead": 12}}


def per_sample(loader) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {}
    counts: Counter = Counter()
    for batch in loader:
        assert batch["patches"].shape == (2, 512, 16 * 16 * 3)
        seg = batch["segment_ids"].numpy()
        for r, keys in enumerate(batch["keys"]):
            for j, key in enumerate(keys):
                counts[key] += 1
                out[key] = batch["patches"][r].numpy()[seg[r] == j + 1]
    assert max(counts.values()) == 1, "a sample came out twice"
    return out


def test_workers_give_same_samples_and_same_patches(demo_dir):
    recipe = Recipe.from_dict(RECIPE)
    ds = PatchloomDataset(recipe, demo_shard_pattern(demo_dir))
    single = per_sample(DataLoader(ds, batch_size=None, num_workers=0))
    multi = per_sample(DataLoader(ds, batch_size=None, num_workers=2))
    assert sorted(single) == sorted(multi)
    in_tars = set()
    for tar_path in sorted(demo_dir.glob("demo-*.tar")):
        with tarfile.open(tar_path) as tar:
            in_tars |= {name.split(".", 1)[0] for name in tar.getnames()}
    assert set(single) == in_tars - set(DEMO_CORRUPT_KEYS)
    for key, patches in single.items():
        np.testing.assert_array_equal(patches, multi[key])


def test_persistent_workers_see_set_epoch(demo_dir):
    recipe = Recipe.from_dict(RECIPE)
    ds = PatchloomDataset(recipe, demo_shard_pattern(demo_dir))
    loader = DataLoader(ds, batch_size=None, num_workers=2, persistent_workers=True)
    orders = []
    for epoch in range(2):
        ds.set_epoch(epoch)
        orders.append([k for b in loader for row in b["keys"] for k in row])
    assert sorted(orders[0]) == sorted(orders[1])
    assert orders[0] != orders[1]
    ds.set_epoch(0)
    assert [k for b in loader for row in b["keys"] for k in row] == orders[0]


def test_numpy_batches_when_asked(demo_dir):
    ds = PatchloomDataset(Recipe.from_dict(RECIPE), demo_shard_pattern(demo_dir), as_tensors=False)
    first = next(iter(ds))
    assert first.patches.dtype == np.uint8 and first.attention_mask().shape == (2, 512, 512)


def test_augmented_masked_recipe_is_worker_count_independent(demo_dir):
    recipe = Recipe.from_dict({
        **RECIPE,
        "crop": {"mode": "random"},
        "augment": [{"name": "HorizontalFlip", "p": 0.5}, {"name": "ColorJitter", "p": 0.8}],
        "drop": {"mode": "block", "output": "mask", "rate": 0.4},
        "patch_ops": [{"name": "jitter"}],
    })
    ds = PatchloomDataset(recipe, demo_shard_pattern(demo_dir))

    def masks(loader):
        out = {}
        for batch in loader:
            seg = batch["segment_ids"].numpy()
            for r, keys in enumerate(batch["keys"]):
                for j, key in enumerate(keys):
                    sel = seg[r] == j + 1
                    out[key] = (batch["patches"][r].numpy()[sel], batch["masked"][r].numpy()[sel])
        return out

    a = masks(DataLoader(ds, batch_size=None, num_workers=0))
    b = masks(DataLoader(ds, batch_size=None, num_workers=2))
    assert a.keys() == b.keys()
    for key in a:
        np.testing.assert_array_equal(a[key][0], b[key][0])
        np.testing.assert_array_equal(a[key][1], b[key][1])
    assert any(m.any() for _, m in a.values())


@pytest.mark.parametrize("num_workers", [0, 2])
def test_loader_state_resumes_exactly(tmp_path, num_workers):
    import json

    import sys
    sys.path.insert(0, str(__import__("pathlib").Path(__file__).parent))
    from conftest import make_shards
    from patchloom.adapters.torch import PatchloomLoader

    paths = make_shards(tmp_path, 3, 14)  # 3 shards over 2 workers: one worker ends early
    recipe = Recipe.from_dict({"source": {"shuffle_buffer": 5},
                               "sizing": {"patch_size": 8, "max_tokens": 64, "mode": "sampled",
                                          "sampled": {"range": [8, 64]}},
                               "packing": {"seq_len": 128, "rows": 2, "max_images_per_row": 6, "lookahead": 6}})

    def loader():
        return PatchloomLoader(PatchloomDataset(recipe, paths, epoch=1), num_workers=num_workers)

    whole = loader()
    full = list(whole)
    assert len(full) >= 6
    end = {k: whole.ledger.to_dict()[k] for k in ("read", "emitted", "skipped", "in_buffer")}
    assert end == {"read": 42, "emitted": 42, "skipped": 0, "in_buffer": 0}
    for pos in (0, 1, 2, 3, len(full) - 1, len(full)):
        first = loader()
        it = iter(first)
        for _ in range(pos):
            next(it)
        state = json.loads(json.dumps(first.state_dict()))
        del it
        again = loader()
        again.load_state_dict(state)
        rest = list(again)
        assert [b["keys"] for b in rest] == [b["keys"] for b in full[pos:]], f"position {pos}"
        assert {k: again.ledger.to_dict()[k] for k in end} == end, f"position {pos}"  # counts carried on
        for a, b in zip(rest, full[pos:]):
            assert torch.equal(a["patches"], b["patches"]) and torch.equal(a["segment_ids"], b["segment_ids"])


def test_loader_refuses_a_different_worker_count(tmp_path, demo_dir):
    from patchloom.adapters.torch import PatchloomLoader

    ds = PatchloomDataset(Recipe.from_dict(RECIPE), demo_shard_pattern(demo_dir))
    state = PatchloomLoader(ds, num_workers=2).state_dict()
    with pytest.raises(ValueError, match="same num_workers"):
        PatchloomLoader(ds, num_workers=0).load_state_dict(state)


def test_loader_refuses_an_old_or_foreign_state_and_hands_a_good_one_to_the_dataset(tmp_path, demo_dir):
    from patchloom.adapters.torch import PatchloomLoader
    from patchloom.pipeline import StateError

    ds = PatchloomDataset(Recipe.from_dict(RECIPE), demo_shard_pattern(demo_dir))
    state = PatchloomLoader(ds, num_workers=0).state_dict()
    old_worker = {**state, "slots": {"0": {"version": 2, "shuffle_rng": None}}}
    for bad in ({**state, "version": 2}, ["not", "a", "state"], {k: v for k, v in state.items() if k != "slots"},
                old_worker):
        with pytest.raises(StateError, match="start the epoch afresh"):
            PatchloomLoader(ds, num_workers=0).load_state_dict(bad)
    assert ds.resume is None
    PatchloomLoader(ds, num_workers=0).load_state_dict(state)
    assert ds.resume == state  # through the dataset's public set_resume, applied once per process
    ds.set_resume(None)
    assert ds.resume is None
