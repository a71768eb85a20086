"""Image augmentation from the recipe's `augment:` list, built with albumentations.

This is the only module that imports albumentations (lazily, inside functions), so the engine can
be swapped without touching the rest of patchloom.

Recipe form: a list of transforms named by their bare albumentations class name, with that class's
parameters beside the name; composes nest through `transforms:`::

    augment:
      - {name: RandomResizedCrop, size: [256, 256], scale: [0.5, 1.0]}
      - {name: HorizontalFlip, p: 0.5}
      - {name: ColorJitter, p: 0.8, brightness: 0.2}
      - {name: OneOf, p: 0.5, transforms: [{name: GaussianBlur}, {name: Sharpen}]}

`p` left out means the class's own default, as albumentations documents it for that class
(0.5 for most transforms, 1.0 for crops and resizes, 0.5 for OneOf and Sequential, 1 for SomeOf);
it is always passed explicitly, so albumentations never falls back to its serialization default.
Inside OneOf/SomeOf the children's `p` are relative weights, as in albumentations.

Safety: a name is looked up only in albumentations' own serialization registry, and only
transform and compose classes are accepted; names with a dot, unknown names, abstract base
classes, `Compose`/`ReplayCompose` (each stage already is one; nest with `Sequential`), and
transforms whose output is not an HxWx3 uint8 image or that need inputs patchloom does not give
(masks, boxes, volumes, metadata) are refused before anything is built.

Stages. Each top-level entry runs in one of two stages, each its own `Compose`, keeping the
user's order within the stage:

- `before`: on the decoded image, before the size plan. Transforms that can change the image's
  size go here, so the token budget holds for what the model sees: every class whose name contains
  "Crop", RandomRotate90, Transpose, D4, SquareSymmetry, RandomScale, LongestMaxSize,
  SmallestMaxSize, Resize, PadIfNeeded, Pad; Rotate with `crop_border: true`; Affine with
  `fit_output: true`; Perspective with `keep_size: false`. A compose goes here if any transform
  inside it does.
- `after`: on the resized image, after the size plan (cheaper: fewer pixels). Everything else:
  photometric transforms, flips, size-keeping warps (Rotate, SafeRotate, Affine, ShiftScaleRotate,
  ElasticTransform, ...), dropouts. These must keep the size; `after_resize` raises otherwise.

A top-level `stage: before | after` overrides the rule. Because stages run at fixed points, an
`after` entry listed ahead of a `before` entry still runs after it.

Seeding. Each call takes an integer seed. The stage's generators are derived from it through
`numpy.random.SeedSequence([seed, stage])` (so the two stages draw independently even from one
seed) and installed on the whole compose tree with albumentations' `set_random_state`; one shared
stream means two identical transforms in a list do not draw identical values. Nothing is read from
albumentations' construction-time, global or per-worker state, so the same (image, seed) gives the
same pixels in any process. Each thread gets its own built composes (transforms keep per-call
state), built from the same specs.
"""

from __future__ import annotations

import difflib
import inspect
import json
import os
import random
import threading
import warnings
from dataclasses import dataclass
from enum import Enum
from typing import Any, Literal

import numpy as np

from ..extras import require

Stage = Literal["before", "after"]
STAGES: tuple[Stage, ...] = ("before", "after")
_STAGE_ID = {"before": 0, "after": 1}

# Classes that can change the image's size whatever their parameters.
_RESIZING = frozenset({
    "RandomRotate90", "Transpose", "D4", "SquareSymmetry", "RandomScale", "LongestMaxSize",
    "SmallestMaxSize", "Resize", "PadIfNeeded", "Pad",
})
# Classes that change the size only with some settings: (attribute on the built transform, value).
_RESIZING_WHEN = {"Rotate": ("crop_border", True), "Affine": ("fit_output", True),
                  "Perspective": ("keep_size", False)}
# Registry names that are not usable transforms here, with the reason.
_REFUSED = {
    "Compose": "each stage is already a Compose; nest transforms with Sequential",
    "ReplayCompose": "each stage is already a Compose; nest transforms with Sequential",
    "Normalize": "it makes float output; patchloom normalises patches itself (output.dtype, mean, std)",
    "ToFloat": "it makes float output; patchloom normalises patches itself (output.dtype, mean, std)",
    "FromFloat": "it expects float input; augmentations here get uint8 images",
    "ToTensorV2": "it makes a tensor; patchloom's batches convert with PackedBatch.to_torch()",
    "ToTensor3D": "it is for 3D volumes; augmentations here get HxWx3 images",
    "CropNonEmptyMaskIfExists": "it needs a mask, and augmentations here get only the image",
    "MaskDropout": "it needs a mask, and augmentations here get only the image",
}
_ABSTRACT = frozenset({"BasicTransform", "DualTransform", "ImageOnlyTransform", "Transform3D",
                       "MaxSizeTransform", "BaseCompose"})
_OWN_KEYS = ("name", "stage")

_lock = threading.Lock()
_cv2_configured = False
_cache: dict[str, Augmenter] = {}
_CACHE_MAX = 32


def _albumentations() -> Any:
    """Import albumentations with its network update check turned off."""
    os.environ.setdefault("NO_ALBUMENTATIONS_UPDATE", "1")
    return require("albumentations", "the recipe's augment section")


def _registry() -> dict[str, type]:
    """Usable names -> classes: albumentations' own registry, transform and compose classes only."""
    _albumentations()
    from albumentations.core.composition import BaseCompose
    from albumentations.core.serialization import SERIALIZABLE_REGISTRY
    from albumentations.core.transforms_interface import BasicTransform

    return {name: cls for name, cls in SERIALIZABLE_REGISTRY.items()
            if isinstance(cls, type) and issubclass(cls, (BasicTransform, BaseCompose))}


def _is_compose(cls: type) -> bool:
    from albumentations.core.composition import BaseCompose

    return issubclass(cls, BaseCompose)


def _refusal(name: str, cls: type) -> str | None:
    if name in _REFUSED:
        return f"not usable here: {_REFUSED[name]}"
    if name in _ABSTRACT or name.startswith(("Base", "_")):
        return "an abstract base class, not a transform; use a concrete transform"
    from albumentations.core.transforms_interface import Transform3D

    if issubclass(cls, Transform3D) or name.endswith("3D"):
        return "it is for 3D volumes; augmentations here get HxWx3 images"
    if "BBox" in name:
        return "it needs bounding boxes, and augmentations here get only the image"
    return None


def _unknown_name(name: str, where: str, registry: dict[str, type]) -> ValueError:
    usable = sorted(n for n, c in registry.items() if _refusal(n, c) is None)
    by_lower = {n.lower(): n for n in usable}
    guess = by_lower.get(name.lower()) or next(iter(difflib.get_close_matches(name, usable, n=1)), None)
    if guess is None:
        low = difflib.get_close_matches(name.lower(), list(by_lower), n=1)
        guess = by_lower[low[0]] if low else None
    hint = f"; did you mean {guess!r}?" if guess else " (names are albumentations class names, e.g. 'HorizontalFlip')"
    return ValueError(f"{where} {name!r}: unknown transform{hint}")


def _default_p(cls: type) -> float:
    param = inspect.signature(cls.__init__).parameters.get("p")
    if param is None or param.default is inspect.Parameter.empty:
        return 1.0
    return float(param.default)


def _serial(spec: Any, where: str, registry: dict[str, type], top: bool) -> dict[str, Any]:
    """Check one recipe entry (recursively) and turn it into albumentations' serialized form.

    Every check here runs before albumentations builds anything."""
    if not isinstance(spec, dict):  # ValueError, not TypeError: pydantic turns it into a RecipeError
        raise ValueError(  # noqa: TRY004
            f"{where}: each transform must be a mapping like {{name: HorizontalFlip, p: 0.5}} "
            f"(got {type(spec).__name__})"
        )
    name = spec.get("name")
    if not isinstance(name, str) or not name:
        raise ValueError(f"{where}: missing `name:` (an albumentations class name, e.g. HorizontalFlip)")
    label = f"{where} {name!r}"
    for key in spec:
        if not isinstance(key, str) or key.startswith("__"):
            raise ValueError(f"{label}: key {key!r} is not allowed; give the class as `name:` and its parameters")
    if "stage" in spec:
        if not top:
            raise ValueError(f"{label}: `stage:` goes on top-level entries only (a compose runs in one stage)")
        if spec["stage"] not in STAGES:
            raise ValueError(f"{label}: stage must be one of 'before', 'after' (got {spec['stage']!r})")
    if "." in name:
        bare = name.rsplit(".", 1)[1]
        if name.startswith("albumentations.") and bare in registry:
            raise ValueError(f"{label}: use the bare class name {bare!r}; dotted paths are not accepted")
        raise ValueError(f"{label}: dotted paths are not accepted; transforms are albumentations class "
                         "names from its registry, e.g. 'HorizontalFlip'")
    cls = registry.get(name)
    if cls is None:
        from albumentations.core.serialization import SERIALIZABLE_REGISTRY

        if name in SERIALIZABLE_REGISTRY:
            raise ValueError(f"{label}: not a transform (only transform and compose classes are accepted)")
        raise _unknown_name(name, where, registry)
    why = _refusal(name, cls)
    if why:
        raise ValueError(f"{label}: {why}")
    out: dict[str, Any] = {"__class_fullname__": name}
    out.update({k: v for k, v in spec.items() if k not in _OWN_KEYS})
    out.setdefault("p", _default_p(cls))
    if _is_compose(cls):
        children = spec.get("transforms")
        if not isinstance(children, list) or not children:
            raise ValueError(f"{label}: a compose needs `transforms:`, a non-empty list of transforms")
        out["transforms"] = [_serial(c, f"{where}.transforms[{j}]", registry, False)
                             for j, c in enumerate(children)]
    elif "transforms" in spec:
        raise ValueError(f"{label}: takes no `transforms:`; only composes (OneOf, SomeOf, Sequential, ...) nest")
    return out


def _check_built(obj: Any, where: str) -> None:
    """Refuse what albumentations only warns about: unknown parameters, inputs we never give."""
    from albumentations.core.composition import BaseCompose

    name = type(obj).__name__
    if isinstance(obj, BaseCompose):
        for j, child in enumerate(obj.transforms):
            _check_built(child, f"{where}.transforms[{j}]")
        return
    bad = list(getattr(obj, "invalid_args", []) or [])
    if bad:
        valid = sorted({"p", *type(obj).InitSchema.model_fields} - {"strict"})
        hints = [f"{b!r} (did you mean {m[0]!r}?)" if (m := difflib.get_close_matches(b, valid, n=1)) else repr(b)
                 for b in bad]
        raise ValueError(f"{where} {name!r}: unknown parameter(s) {', '.join(hints)}; "
                         f"{name} takes {', '.join(valid)}")
    needs = set(getattr(obj, "targets_as_params", []) or []) - {"image", "images"}
    if needs:
        raise ValueError(f"{where} {name!r}: it needs {', '.join(sorted(needs))}, and augmentations here "
                         "get only the image")


def _albu_message(exc: Exception) -> str:
    lines = [ln for ln in str(exc).splitlines() if not ln.strip().startswith("For further information")]
    text = "\n".join(lines).strip() or type(exc).__name__
    return text if isinstance(exc, ValueError) else f"{type(exc).__name__}: {text}"


def _culprit(serial: dict[str, Any], where: str) -> str:
    """The deepest entry path whose own build fails (children first), to name in an error."""
    A = _albumentations()
    for j, child in enumerate(serial.get("transforms", [])):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                A.from_dict({"transform": child})
        except Exception:  # noqa: BLE001 - albumentations raises many types; only locating here
            return _culprit(child, f"{where}.transforms[{j}]")
    return f"{where} {serial['__class_fullname__']!r}"


def _build(serial: dict[str, Any], where: str) -> Any:
    """albumentations' from_dict on a checked entry; errors name the entry path and the transform."""
    A = _albumentations()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            obj = A.from_dict({"transform": serial})
        except Exception as exc:  # noqa: BLE001 - any build failure becomes one named ValueError
            raise ValueError(f"{_culprit(serial, where)}: {_albu_message(exc)}") from None
    _check_built(obj, where)
    for w in caught:
        message = str(w.message)
        if "are not valid for transform" not in message:
            warnings.warn(f"{where} {serial['__class_fullname__']!r}: {message}", w.category, stacklevel=3)
    return obj


def _size_changing(obj: Any) -> bool:
    """Whether a built transform (or any transform inside a compose) may change the image size."""
    from albumentations.core.composition import BaseCompose

    if isinstance(obj, BaseCompose):
        return any(_size_changing(t) for t in obj.transforms)
    name = type(obj).__name__
    if "Crop" in name or name in _RESIZING:
        return True
    if name in _RESIZING_WHEN:
        attr, value = _RESIZING_WHEN[name]
        return getattr(obj, attr, None) == value
    return False


def _plain(value: Any) -> Any:
    """albumentations' serialized values -> recipe data (lists, not tuples; enums as values)."""
    if isinstance(value, Enum):
        return _plain(value.value)
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


def _to_spec(serialized: dict[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {"name": serialized["__class_fullname__"]}
    for key, value in serialized.items():
        if key == "__class_fullname__":
            continue
        out[key] = [_to_spec(t) for t in value] if key == "transforms" else _plain(value)
    return out


def _configure_cv2() -> None:
    global _cv2_configured
    with _lock:
        if not _cv2_configured:
            cv2 = require("cv2", "augmentation")
            cv2.setNumThreads(0)  # parallelism comes from patchloom's workers, not OpenCV's pool
            _cv2_configured = True


@dataclass(frozen=True, slots=True)
class _Entry:
    serial: dict[str, Any]
    stage: Stage
    name: str


def _parse(specs: list[dict[str, Any]]) -> list[tuple[_Entry, Any]]:
    """Check and build every entry; each built object comes with its resolved stage."""
    if not isinstance(specs, list):  # ValueError, not TypeError: pydantic turns it into a RecipeError
        raise ValueError(  # noqa: TRY004
            f"augment must be a list of transforms (got {type(specs).__name__})"
        )
    registry = _registry()
    serials = [_serial(s, f"augment[{i}]", registry, True) for i, s in enumerate(specs)]
    built = []
    for i, (spec, serial) in enumerate(zip(specs, serials)):
        obj = _build(serial, f"augment[{i}]")
        stage = spec.get("stage") or ("before" if _size_changing(obj) else "after")
        built.append((_Entry(serial, stage, spec["name"]), obj))
    return built


def validate_augment(specs: list[dict[str, Any]]) -> None:
    """Build the list once and discard it; raise ValueError naming the entry path and transform."""
    _parse(specs)


def _describe(obj: Any) -> str:
    from albumentations.core.composition import BaseCompose

    name = type(obj).__name__
    if isinstance(obj, BaseCompose):
        return f"{name}[{', '.join(_describe(t) for t in obj.transforms)}]"
    return name


class Augmenter:
    """Built once per process from the recipe's specs; applies seeded transforms per image."""

    def __init__(self, specs: list[dict[str, Any]]) -> None:
        built = _parse(specs)
        _configure_cv2()
        self._entries = [entry for entry, _ in built]
        self._names = {s: [_describe(obj) for e, obj in built if e.stage == s] for s in STAGES}
        self.has_before = bool(self._names["before"])
        self.has_after = bool(self._names["after"])
        self._local = threading.local()
        self._local.composes = self._composes([obj for _, obj in built])

    def _composes(self, objs: list[Any] | None = None) -> dict[str, Any]:
        """One Compose per stage, in the user's order within the stage."""
        A = _albumentations()
        if objs is None:
            objs = [_build(e.serial, f"augment[{i}]") for i, e in enumerate(self._entries)]
        return {s: A.Compose([o for e, o in zip(self._entries, objs) if e.stage == s], p=1.0) for s in STAGES}

    def _compose(self, stage: Stage) -> Any:
        composes = getattr(self._local, "composes", None)
        if composes is None:  # first call on this thread: its own transform objects
            composes = self._local.composes = self._composes()
        return composes[stage]

    def _apply(self, image: np.ndarray, seed: int, stage: Stage) -> np.ndarray:
        if not isinstance(image, np.ndarray) or image.ndim != 3 or image.shape[2] != 3 or image.dtype != np.uint8:
            shape = getattr(image, "shape", None)
            raise ValueError(f"augment needs an HxWx3 uint8 array (got {type(image).__name__} {shape} "
                             f"{getattr(image, 'dtype', '')})")
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise ValueError(f"augment needs a non-negative integer seed (got {seed!r})")
        compose = self._compose(stage)
        seq = np.random.SeedSequence([int(seed), _STAGE_ID[stage]])
        py_seed = int.from_bytes(seq.generate_state(4, np.uint32).tobytes(), "little")
        compose.set_random_state(np.random.default_rng(seq), random.Random(py_seed))
        out = compose(image=np.ascontiguousarray(image))["image"]
        if not isinstance(out, np.ndarray) or out.ndim != 3 or out.shape[2] != 3 or out.dtype != np.uint8:
            raise ValueError(
                f"augment stage {stage!r} ({', '.join(self._names[stage])}) must give an HxWx3 uint8 image "
                f"(got {getattr(out, 'shape', type(out).__name__)} {getattr(out, 'dtype', '')}); check "
                "parameters such as ToGray's num_output_channels"
            )
        return np.ascontiguousarray(out)

    def before_sizing(self, image: np.ndarray, seed: int) -> np.ndarray:
        """HxWx3 uint8 -> HxWx3 uint8 (any size) through the `before` stage; a no-op if empty."""
        if not self.has_before:
            return image
        return self._apply(image, seed, "before")

    def after_resize(self, image: np.ndarray, seed: int) -> np.ndarray:
        """HxWx3 uint8 -> same-size HxWx3 uint8 through the `after` stage; a no-op if empty."""
        if not self.has_after:
            return image
        out = self._apply(image, seed, "after")
        if out.shape != image.shape:
            raise ValueError(
                f"augment stage 'after' ({', '.join(self._names['after'])}) changed the image size from "
                f"{image.shape[1]}x{image.shape[0]} to {out.shape[1]}x{out.shape[0]} after the size plan; "
                "size-changing transforms (crops, resizes, pads, rotations by 90, transposes) must run "
                "before it: set `stage: before` on that entry"
            )
        return out

    def to_specs(self) -> list[dict[str, Any]]:
        """Recipe-style dicts (name, stage, every parameter resolved by albumentations), user order."""
        objs = [_build(e.serial, f"augment[{i}]") for i, e in enumerate(self._entries)]
        specs = []
        for entry, obj in zip(self._entries, objs):
            spec = _to_spec(obj.to_dict_private())
            specs.append({"name": spec.pop("name"), "stage": entry.stage, **spec})
        return specs

    def describe(self) -> dict[str, list[str]]:
        """{"before": [names], "after": [names]} in application order, composes with their children."""
        return {s: list(self._names[s]) for s in STAGES}


def augmenter_for(specs: list[dict[str, Any]]) -> Augmenter:
    """The process's Augmenter for these specs (cached by their canonical JSON)."""
    key = json.dumps(specs, sort_keys=True, separators=(",", ":"), default=repr)
    with _lock:
        aug = _cache.get(key)
    if aug is None:
        aug = Augmenter(specs)
        with _lock:
            if len(_cache) >= _CACHE_MAX:
                _cache.pop(next(iter(_cache)))
            aug = _cache.setdefault(key, aug)
    return aug
