"""Optional dependencies: which extra brings which module, and one clear error when it is missing."""

from __future__ import annotations

import importlib
from types import ModuleType

from .errors import PatchloomError

#: Importable module -> the patchloom extra that installs it.
EXTRAS: dict[str, str] = {
    "albumentations": "augment",
    "matplotlib": "report",
    "torch": "torch",
    "ray": "ray",
    "pyarrow": "parquet",
    "av": "video",
}

#: Modules of patchloom's own dependencies whose distribution has another name; missing, the install is broken.
CORE: dict[str, str] = {"cv2": "opencv-python-headless", "PIL": "pillow", "yaml": "pyyaml"}


class MissingExtraError(PatchloomError, ImportError):
    """An optional package is not installed; the message names the extra that brings it."""


def missing_extra_message(module: str, purpose: str = "") -> str:
    """One line saying which extra to install for `module` (top-level name)."""
    top = module.split(".", 1)[0]
    extra = EXTRAS.get(top)
    why = f" for {purpose}" if purpose else ""
    if top in CORE:
        return (f"the package {top!r} ({CORE[top]}, which patchloom depends on) is needed{why} but is not "
                f"installed: pip install {CORE[top]}, or reinstall patchloom")
    if extra is None:
        return f"the package {top!r} is needed{why} but is not installed: pip install {top}"
    hint = " (on CPU-only machines install torch==2.13.0 first)" if extra == "torch" else ""
    return f"the optional package {top!r} is needed{why} but is not installed: pip install 'patchloom[{extra}]'{hint}"


def require(module: str, purpose: str = "") -> ModuleType:
    """Import `module`, or raise MissingExtraError naming the extra to install."""
    try:
        return importlib.import_module(module)
    except ModuleNotFoundError as exc:
        if exc.name != module.split(".", 1)[0]:
            raise  # the package is there but a part or a dependency of it is broken: show that
        raise MissingExtraError(missing_extra_message(module, purpose)) from exc


def as_missing_extra(exc: BaseException) -> str | None:
    """The one-line message for a ModuleNotFoundError of a known optional package, else None."""
    if isinstance(exc, MissingExtraError):
        return str(exc)
    if isinstance(exc, ModuleNotFoundError) and exc.name and exc.name.split(".", 1)[0] in {**EXTRAS, **CORE}:
        return missing_extra_message(exc.name)
    return None
