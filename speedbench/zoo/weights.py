"""Where a model's weights come from: none, torchvision (local cache only), demo, file:PATH.

Every file is read with ``torch.load(..., weights_only=True)``: a checkpoint is untrusted
input, and a pickle that would run code is refused before anything in it runs.
"""
from __future__ import annotations

import contextlib
import hashlib
import json
import os
from pathlib import Path

from speedbench.errors import UserError
from speedbench.zoo.registry import get_spec

SOURCES = ("none", "torchvision", "demo", "file:PATH")
_WRAPPER_KEYS = ("state_dict", "model", "model_state_dict", "weights")
_SHA_CACHE: dict[tuple, str] = {}
DEMO_ROOT = Path(__file__).parent / "weights"   # committed demo weights + manifest.json
# Changing how untrained weights are made must change their digest (and so the export cache).
UNTRAINED_RECIPE = "seed0+bn-calibration-v1"


def torchvision_weights(model_id: str):
    """The torchvision weights enum entry of a zoo model (its url and metadata)."""
    from torchvision.models import get_weight

    spec = get_spec(model_id)
    if not spec.weights_enum:
        raise UserError(f"model {model_id}: torchvision ships no weights for it (use none, demo or file:PATH)")
    return get_weight(spec.weights_enum)


def parse_weights(weights) -> tuple[str, str]:
    """'none' | 'torchvision' | 'demo' | 'file:PATH' -> (kind, path-or-'')."""
    w = "none" if weights in (None, "") else str(weights)
    if w in ("none", "torchvision", "demo"):
        return w, ""
    if w.startswith("file:") and len(w) > 5:
        return "file", w[5:]
    raise UserError(f"weights {w!r}: expected one of {', '.join(SOURCES)}")


def sha256_file(path) -> str:
    path = Path(path)
    st = path.stat()
    key = (str(path.resolve()), st.st_size, st.st_mtime_ns)
    if key not in _SHA_CACHE:
        h = hashlib.sha256()
        with open(path, "rb") as f:
            for chunk in iter(lambda: f.read(1 << 20), b""):
                h.update(chunk)
        _SHA_CACHE[key] = h.hexdigest()
    return _SHA_CACHE[key]


def safe_load(path, what: str = "checkpoint") -> dict:
    """torch.load with weights_only=True; every failure is a one-line UserError naming the file."""
    import pickle
    import zipfile

    import torch

    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: {what} file not found")
    try:
        obj = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        if "weights only" in str(exc).lower() or "weights_only" in str(exc).lower():
            raise UserError(f"{path}: refused to load: the {what} holds objects other than tensors "
                            f"(a pickle that could run code); only plain state dicts are accepted") from None
        raise UserError(f"{path}: corrupt {what} ({first[:120]})") from None
    except (RuntimeError, EOFError, OSError, ValueError, zipfile.BadZipFile, KeyError, AttributeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise UserError(f"{path}: not a readable torch {what} ({first[:120]})") from None
    except Exception as exc:  # noqa: BLE001 - a damaged file can make the unpickler raise anything
        # Seen: random bytes make torch's weights-only unpickler raise IndexError (an opcode that
        # reads past its stack). Whatever the unpickler trips on, the file is the user's mistake.
        raise UserError(f"{path}: corrupt {what} (the unpickler failed: {type(exc).__name__})") from None
    return obj


def state_dict_from(obj, path) -> dict:
    """A state dict from a plain state dict or a training checkpoint dict wrapping one."""
    import torch

    if isinstance(obj, dict):
        for key in _WRAPPER_KEYS:
            if isinstance(obj.get(key), dict):
                obj = obj[key]
                break
    if not isinstance(obj, dict) or not obj or not all(torch.is_tensor(v) for v in obj.values()):
        raise UserError(f"{path}: not a state dict (expected a mapping of parameter names to tensors, "
                        f"or a checkpoint dict with one under {'/'.join(_WRAPPER_KEYS)})")
    if all(k.startswith("module.") for k in obj):   # saved from DataParallel
        obj = {k[len("module."):]: v for k, v in obj.items()}
    return {k: (v.float() if v.is_floating_point() else v) for k, v in obj.items()}


@contextlib.contextmanager
def patched_torchvision_loader(load):
    """Make torchvision's builders fetch a weights URL through `load(url)` instead of the network."""
    from torchvision.models import _api

    original = _api.load_state_dict_from_url
    _api.load_state_dict_from_url = lambda url, *a, **k: load(url)
    try:
        yield
    finally:
        _api.load_state_dict_from_url = original


def torchvision_cache_file(url: str) -> Path:
    import urllib.parse

    import torch

    return Path(torch.hub.get_dir()) / "checkpoints" / os.path.basename(urllib.parse.urlparse(url).path)


def load_torchvision_cached(url: str, model_id: str) -> dict:
    path = torchvision_cache_file(url)
    if not path.is_file():
        raise UserError(f"torchvision weights for {model_id} are not cached: expected {path} "
                        f"(copy {os.path.basename(path)} there, or point TORCH_HOME at a cache that has it; "
                        f"speedbench never downloads)")
    return state_dict_from(safe_load(path, "torchvision weights"), path)


def demo_manifest() -> tuple[Path, dict]:
    root = Path(DEMO_ROOT)
    path = root / "manifest.json"
    if not path.is_file():
        raise UserError(f"{path}: demo weights manifest not found (the demo zoo is not installed)")
    try:
        return root, json.loads(path.read_text())
    except ValueError as exc:
        raise UserError(f"{path}: not valid JSON ({exc})") from None


def trained_sizes(model_id: str, weights: str) -> list[int] | None:
    """Input sizes the weights were trained at, where their manifest records it (demo weights); else None."""
    if weights != "demo":
        return None        # torchvision's and users' checkpoints carry no such record here
    try:
        _, manifest = demo_manifest()
    except UserError:
        return None
    recipe = (manifest.get("models", {}).get(model_id) or {}).get("recipe") or {}
    sizes = recipe.get("train_sizes") or ([max(recipe["image_size"])] if recipe.get("image_size") else [])
    return sorted({int(s) for s in sizes}) or None


def demo_entry(model_id: str) -> tuple[Path, dict]:
    root, manifest = demo_manifest()
    entry = manifest.get("models", {}).get(model_id)
    if not entry:
        raise UserError(f"{root / 'manifest.json'}: no demo weights for model {model_id!r}")
    path = (root / entry["file"]).resolve()
    if root.resolve() not in path.parents:
        raise UserError(f"{root / 'manifest.json'}: models.{model_id}.file points outside {root}")
    return path, entry


def load_demo(model_id: str) -> tuple[dict, dict]:
    path, entry = demo_entry(model_id)
    if not path.is_file():
        raise UserError(f"{path}: demo weights file not found")
    if sha256_file(path) != entry.get("sha256"):
        raise UserError(f"{path}: sha256 does not match models.{model_id}.sha256 in the demo manifest")
    return state_dict_from(safe_load(path, "demo weights"), path), entry


def installed_version(dist: str) -> str:
    """`dist.__version__` without importing it (importing torch costs seconds on a cache hit).

    The package's version.py holds the full version with its local label (2.14.1+cu130);
    importlib.metadata gives only the public part (2.14.1), so it is the fallback. Reading the
    file keeps the cache key exactly what `torch.__version__` was, so existing entries still hit.
    """
    import re
    from importlib import metadata

    try:
        dist_info = metadata.distribution(dist)
    except metadata.PackageNotFoundError:
        return "none"
    try:
        text = Path(dist_info.locate_file(f"{dist}/version.py")).read_text()
        found = re.search(r"^__version__\s*(?::\s*str\s*)?=\s*['\"]([^'\"]+)['\"]", text, re.M)
        if found:
            return found.group(1)
    except OSError:
        pass
    return dist_info.version


def weights_digest(model_id: str, weights="none") -> str:
    """16 hex digits that change whenever the weights a build would load change.

    Without importing torch (seconds, paid per graph by every sweep that finds its exports
    cached): versions are read from the installed files, digests from the weight files or
    the demo manifest. Only torchvision weights import torchvision, for their file's URL.
    """
    kind, path = parse_weights(weights)
    if kind == "none":
        # Untrained weights are a seeded init; they change only with the library versions.
        blob = (f"none|{model_id}|{UNTRAINED_RECIPE}|{installed_version('torch')}|"
                f"{installed_version('torchvision')}")
        return hashlib.sha256(blob.encode()).hexdigest()[:16]
    if kind == "torchvision":
        url = torchvision_weights(model_id).url
        file = torchvision_cache_file(url)
        if not file.is_file():
            load_torchvision_cached(url, model_id)   # raises the one-line "not cached" error
        return sha256_file(file)[:16]
    if kind == "demo":
        return str(demo_entry(model_id)[1].get("sha256", ""))[:16]
    if not Path(path).is_file():
        raise UserError(f"{path}: checkpoint file not found")
    return sha256_file(path)[:16]
