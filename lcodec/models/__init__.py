"""Model registry: built-in models by name, model files by path, identities in containers.

A model object offers `teacher_chunks(data, starts, lengths)` (the encoder's pass, yielding
(symbols, tables) in coding order), `stepper(lengths)` (the decoder's step function),
`coder` ("queue" or "stack"), and `identity` (what a container records to name it).
"""
from __future__ import annotations

import importlib
import os
from collections.abc import Mapping

from ..errors import DataError, ModelError
from ..format import modelfile
from .strata import Strata


class _Architectures(Mapping):
    """What a model file may hold: architecture name -> class. Each model's module is
    imported when its name is first looked up, so packing or unpacking with one model
    defines no other model's kernels (about 0.07 s of a small file's start-up)."""

    _WHERE = {"strata": "strata", "weft": "weft", "braid": "braid", "tessel": "tessel", "heddle": "heddle"}

    def __getitem__(self, name):
        module = importlib.import_module(f".{self._WHERE[name]}", __name__)
        return getattr(module, name.capitalize())

    def __iter__(self):
        return iter(self._WHERE)

    def __len__(self):
        return len(self._WHERE)


BUILTIN = {"strata": Strata}  # models an archive can name without a model file
ARCHITECTURES = _Architectures()


NAMED_IN_IDENTITY = {"weft", "tessel"}  # (tessel's golden archives were made with the name too;
# weft files with hashed contexts came later and are named by their SHA-256 alone, and so are
# tessel files whose metadata says `"archives_name_file": false`, which `train` writes since
# 2026-12-05: the name cost 84 bytes in every archive, 1% of a 128 x 128 grey image's)


class Loaded:
    """A model read from a model file; its identity is the file's SHA-256."""

    def __init__(self, inner, sha256: str, path: str, meta: dict):
        self.inner, self.sha256, self.path, self.meta = inner, sha256, path, meta
        self.coder = inner.coder
        self.label = f"{meta['architecture']['name']} from {os.path.basename(path)}"

    @property
    def identity(self) -> dict:
        """Model name and the file's SHA-256. The file's base name (for messages only) is
        recorded only for the weft and tessel files that shipped that way (their archives must
        re-encode to the same bytes): it makes the identity JSON instead of the 39-byte binary
        form, about 84 bytes more in every archive."""
        ident = {"model": self.meta["architecture"]["name"], "sha256": self.sha256}
        if (ident["model"] in NAMED_IN_IDENTITY and self.meta.get("archives_name_file", True)
                and not self.meta["architecture"].get("params", {}).get("hash_orders")):
            ident["file"] = os.path.basename(self.path)
        return ident

    def teacher_chunks(self, *a, **k):
        return self.inner.teacher_chunks(*a, **k)

    def stepper(self, *a, **k):
        return self.inner.stepper(*a, **k)

    def __getattr__(self, name):  # image coding entry points of a pixel model (tessel)
        if name in ("teacher_tables", "step_decode", "has_depth", "has_stages", "stages_min_gain", "role_tables",
                    "set_backend", "takes_image"):
            return getattr(self.inner, name)
        raise AttributeError(name)

    @property
    def is_image_model(self) -> bool:
        return hasattr(self.inner, "step_decode")

    def lanes_for(self, n: int):
        f = getattr(self.inner, "lanes_for", None)
        return f(n) if f else None


def default_model():
    return Strata()


def load_model(path: str) -> Loaded:
    meta, arrays, sha = modelfile.load(path)
    arch = meta["architecture"]
    cls = ARCHITECTURES.get(arch["name"])
    if cls is None:
        raise ModelError(f"model file {path}: unknown architecture {arch['name']!r} "
                         f"(this lcodec knows: {', '.join(ARCHITECTURES)})")
    try:
        inner = cls.from_params(arch.get("params", {}), arrays) if arrays else cls.from_params(arch.get("params", {}))
    except (KeyError, TypeError, ValueError) as e:
        raise ModelError(f"model file {path}: bad parameters ({e})") from None
    return Loaded(inner, sha, path, meta)


def resolve(model):
    """None -> the default adaptive model; a path -> a model file; a model object as is."""
    if model is None:
        return default_model()
    if isinstance(model, (str, os.PathLike)):
        return load_model(os.fspath(model))
    return model


def identity_text(identity: dict) -> str:
    if "sha256" in identity:
        name = f" {identity['file']}" if isinstance(identity.get("file"), str) else ""
        return f"{identity['model']} model file{name} (sha256 {identity['sha256']})"
    if "preset" in identity:
        return f"built-in {identity['model']}, preset {identity['preset']}"
    return f"built-in {identity['model']} {identity.get('params', {})}"


def for_identity(identity: dict, supplied):
    """The model an archive needs, checked against the one the user gave (if any)."""
    if "sha256" in identity:
        if supplied is None or isinstance(supplied, Strata):
            raise ModelError(f"this archive needs the {identity_text(identity)}; pass it with -m/--model")
        m = resolve(supplied)
        if getattr(m, "sha256", None) != identity["sha256"]:
            raise ModelError(f"wrong model: this archive needs the {identity_text(identity)}, "
                             f"but the given model is {identity_text(m.identity)}")
        return m
    if isinstance(supplied, (str, os.PathLike)):
        resolve(supplied)  # not needed here, but a damaged or hostile model file given is still refused
    cls = BUILTIN.get(identity.get("model"))
    if cls is None:
        raise DataError(f"archive names an unknown built-in model {identity.get('model')!r}")
    try:
        return cls.from_identity(identity)
    except (KeyError, TypeError, ValueError) as e:
        raise DataError(f"header damaged (bad model parameters: {e})") from None
