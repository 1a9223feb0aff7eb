"""Held-out sets: COCO-style annotation JSON with an image folder, or a Pascal VOC folder.

Everything is validated on load; a problem is a one-line UserError naming the
file and the image / annotation id. Image paths are confined to the dataset
root: a file_name that leads outside it (absolute, "..", a symlink out) is refused.

Pascal VOC is converted to the COCO layout: images get ids 1..N in sorted XML
file order, categories ids 1..C in sorted name order, boxes move from VOC's
1-based inclusive corners to [x, y, w, h] (x = xmin - 1, w = xmax - xmin + 1,
the usual conversion, from memory of common VOC loaders). Objects marked
"difficult" become iscrowd=1, so detections on them are neither counted nor
penalised, as VOC intends; note the COCO protocol then scores overlap against
them as intersection / detection area.
"""
from __future__ import annotations

import hashlib
import json
import math
import warnings
from dataclasses import dataclass
from functools import cached_property
from itertools import chain
from pathlib import Path

import numpy as np

from speedbench.data.images import DEFAULT_MAX_PIXELS, read_image
from speedbench.data.jsonio import INT_LIMIT, read_json
from speedbench.errors import UserError

ANNOTATIONS_FILE = "annotations.json"
# Boxes may overhang the image by this much (px): VOC's inclusive corners and float
# rounding in converters put correct boxes a fraction of a pixel outside.
BOX_TOLERANCE = 1.0
# Names in torchvision's COCO label list that are not classes.
PLACEHOLDER_CLASSES = {"__background__", "n/a", ""}
# Largest image side the annotations may claim (px); the pixel count is bounded separately
# (max_pixels). Ids must fit in 64 bits (numpy / pycocotools arrays).
MAX_SIDE = 1_000_000


@dataclass(frozen=True)
class ImageRecord:
    id: int
    file_name: str
    path: Path       # resolved, inside the dataset root
    width: int
    height: int

    def __getitem__(self, key):  # records also read like dicts: rec["id"]
        return getattr(self, key)


class Dataset:
    """A validated held-out set. `coco` is its COCO-format dict (ids as in the source)."""

    def __init__(self, root: Path, coco: dict, source: Path, images: list[ImageRecord],
                 max_pixels: int = DEFAULT_MAX_PIXELS):
        self.root = root
        self.max_pixels = max_pixels
        self.coco = coco
        self.source = source
        self.images = images
        self.categories = [{"id": c["id"], "name": c["name"]} for c in coco["categories"]]
        self._by_id = {im.id: im for im in images}

    def __len__(self) -> int:
        return len(self.images)

    def __repr__(self) -> str:
        return (f"Dataset({self.source}, {len(self.images)} images, "
                f"{len(self.coco['annotations'])} boxes, {len(self.categories)} categories)")

    def check_images(self) -> None:
        """Decode every image once: UserError for a missing, corrupt, oversized or mis-sized file."""
        for rec in self.images:
            _check_image(rec, self.source, self.max_pixels)

    def read(self, image_id: int) -> np.ndarray:
        """The image as uint8 [H, W, 3] RGB."""
        if image_id not in self._by_id:
            raise UserError(f"{self.source}: no image with id {image_id!r}")
        im = self._by_id[image_id]
        try:
            return read_image(im.path, self.max_pixels)
        except UserError as exc:
            raise UserError(f"{self.source}: image id {im.id}: {exc}") from None

    def subset(self, n: int, seed: int = 0) -> "Dataset":
        """n images drawn without replacement (seeded), in their original order."""
        if not isinstance(n, int) or n < 1:
            raise UserError(f"subset size must be a whole number >= 1, not {n!r}")
        if n >= len(self.images):
            return self
        pick = np.sort(np.random.default_rng(seed).choice(len(self.images), n, replace=False))
        return self._only([self.images[i] for i in pick])

    def first(self, n: int) -> "Dataset":
        """The first n images (file order)."""
        if not isinstance(n, int) or n < 1:
            raise UserError(f"image limit must be a whole number >= 1, not {n!r}")
        return self if n >= len(self.images) else self._only(self.images[:n])

    def _only(self, images: list[ImageRecord]) -> "Dataset":
        keep = {im.id for im in images}
        coco = {
            "images": [im for im in self.coco["images"] if im["id"] in keep],
            "annotations": [a for a in self.coco["annotations"] if a["image_id"] in keep],
            "categories": self.coco["categories"],
        }
        return Dataset(self.root, coco, self.source, images, self.max_pixels)

    @property
    def fingerprint(self) -> str:  # the name the sweep's caches look for
        return self.digest

    @cached_property
    def digest(self) -> str:
        """sha256 of the annotations and the bytes of every image: a cache key."""
        h = hashlib.sha256(json.dumps(self.coco, sort_keys=True).encode())
        for im in sorted(self.images, key=lambda r: r.id):
            try:
                h.update(hashlib.sha256(im.path.read_bytes()).digest())
            except OSError:
                raise UserError(f"{self.source}: image id {im.id}: cannot read {im.path}") from None
        return h.hexdigest()


def load_dataset(path, images_dir=None, check_images: bool = True,
                 max_pixels: int = DEFAULT_MAX_PIXELS) -> Dataset:
    """Load and validate a held-out set.

    path: a COCO JSON file (images relative to its folder, or to images_dir), a folder
    holding annotations.json, or a Pascal VOC folder (Annotations/*.xml + JPEGImages/).
    check_images decodes every image once (missing / corrupt files, size mismatch);
    turn it off when only the annotations are needed (evaluating a results file).
    max_pixels: images with more pixels (width x height, from the annotations and from each
    file's header) are refused, naming the file; the profile key [dataset] max_pixels.
    """
    coco, root, source = _read_annotations(path, images_dir)
    if not root.is_dir():
        raise UserError(f"{root}: image folder not found")
    images = [_record(im, root, source) for im in coco["images"]]
    for rec in images:
        if rec.width * rec.height > max_pixels:
            raise UserError(f"{source}: image {rec.id}: {rec.file_name} is {rec.width}x{rec.height} = "
                            f"{rec.width * rec.height} pixels, above the limit of {max_pixels} "
                            f"(profile key dataset.max_pixels); refused")
    dataset = Dataset(root, coco, source, images, max_pixels)
    if check_images:
        dataset.check_images()
    return dataset


def load_annotations(path) -> dict:
    """The validated COCO dict of a held-out set (any form load_dataset reads), without
    touching its images: all that scoring a results file needs."""
    return _read_annotations(path, None)[0]


def _read_annotations(path, images_dir):
    """(validated COCO dict, image root, source path) of a dataset path."""
    path = Path(path)
    if not path.exists():
        raise UserError(f"{path}: dataset not found")
    if path.is_dir() and (path / ANNOTATIONS_FILE).is_file():
        path = path / ANNOTATIONS_FILE
    if path.is_file():
        coco = _read_json(path)
        root = Path(images_dir) if images_dir else path.parent
        source = path
    elif (path / "Annotations").is_dir():
        root = Path(images_dir) if images_dir else path / "JPEGImages"
        coco = _voc_to_coco(path / "Annotations")
        source = path / "Annotations"
    else:
        raise UserError(f"{path}: not a dataset (expected a COCO JSON file, a folder with "
                        f"{ANNOTATIONS_FILE}, or a Pascal VOC folder with Annotations/)")
    return validate_coco(coco, source), root, source


def category_map(dataset, model_classes) -> dict[int, int]:
    """model label index -> dataset category id.

    model_classes: names by label index (torchvision weights: torchvision_coco_classes(),
    where index == COCO id). Names match case-, space-, '-' and '_'-insensitively. Only
    when no name matches are labels matched by id (label index == category id), with a
    warning: that is a guess. Dataset categories that nothing maps to can never be
    detected and score AP 0 (warned). UserError when nothing maps at all.
    """
    cats = dataset.categories if hasattr(dataset, "categories") else dataset["categories"]
    by_name = {_norm(c["name"]): c["id"] for c in cats}
    labels = [(i, _norm(n)) for i, n in enumerate(model_classes) if _norm(n) not in PLACEHOLDER_CLASSES]
    mapping = {i: by_name[n] for i, n in labels if n in by_name}
    if not mapping:
        ids = {c["id"] for c in cats}
        mapping = {i: i for i, _ in labels if i in ids}
        if mapping:
            warnings.warn("no class name of the model matches a dataset category; mapping "
                          "label index to category id instead - check that this is intended",
                          stacklevel=2)
    if not mapping:
        source = getattr(dataset, "source", None)
        where = f"{source}: " if source else ""
        if not cats:
            raise UserError(f"{where}the dataset has no categories; nothing to score the model's classes against")
        raise UserError(
            f"{where}no model class maps to a dataset category: model has {_sample(n for _, n in labels)}, "
            f"dataset has {_sample(c['name'] for c in cats)}")
    missing = [c["name"] for c in cats if c["id"] not in mapping.values()]
    if missing:
        warnings.warn(f"dataset categories no model class maps to (they will score AP 0): "
                      f"{_sample(missing)}", stacklevel=2)
    return mapping


def torchvision_coco_classes() -> list[str]:
    """torchvision's COCO category names by label index (index == COCO id); no download."""
    from torchvision.models.detection import FasterRCNN_ResNet50_FPN_Weights

    return list(FasterRCNN_ResNet50_FPN_Weights.DEFAULT.meta["categories"])


def validate_coco(coco, source) -> dict:
    """Check a COCO dict; return a clean copy (area and iscrowd filled in)."""
    if not isinstance(coco, dict):
        raise UserError(f"{source}: expected a JSON object with images, annotations, categories")
    for key in ("images", "annotations", "categories"):
        if not isinstance(coco.get(key), list):
            raise UserError(f"{source}: missing or non-list {key!r}")
    images, cats, anns = {}, {}, []
    for i, im in enumerate(coco["images"]):
        where = f"{source}: image {_label(im, i)}"
        if not isinstance(im, dict):
            raise UserError(f"{where}: expected an object")
        _need_int(im, "id", where)
        if im["id"] in images:
            raise UserError(f"{source}: duplicate image id {im['id']}")
        if not isinstance(im.get("file_name"), str) or not im["file_name"]:
            raise UserError(f"{where}: missing file_name")
        for key in ("width", "height"):
            if not 0 < _need_int(im, key, where) <= MAX_SIDE:
                raise UserError(f"{where}: {key} must be in 1..{MAX_SIDE}, got {im[key]}")
        images[im["id"]] = {k: im[k] for k in ("id", "file_name", "width", "height")}
    names = set()
    for i, c in enumerate(coco["categories"]):
        where = f"{source}: category {_label(c, i)}"
        if not isinstance(c, dict):
            raise UserError(f"{where}: expected an object")
        _need_int(c, "id", where)
        if c["id"] in cats:
            raise UserError(f"{source}: duplicate category id {c['id']}")
        if not isinstance(c.get("name"), str):
            raise UserError(f"{where}: missing name")
        if _norm(c["name"]) in names:
            raise UserError(f"{where}: duplicate category name {c['name']!r}")
        names.add(_norm(c["name"]))
        cats[c["id"]] = {"id": c["id"], "name": c["name"]}
    anns = _clean_annotations(coco["annotations"], images, cats)
    if anns is not None:
        return {"images": list(images.values()), "annotations": anns, "categories": list(cats.values())}
    anns = []  # something is wrong: walk the entries to name the first bad one
    seen = set()
    for i, a in enumerate(coco["annotations"]):
        where = f"{source}: annotation {_label(a, i)}"
        if not isinstance(a, dict):
            raise UserError(f"{where}: expected an object")
        _need_int(a, "id", where)
        if a["id"] in seen:
            raise UserError(f"{source}: duplicate annotation id {a['id']}")
        seen.add(a["id"])
        if _need_int(a, "image_id", where) not in images:
            raise UserError(f"{where}: unknown image_id {a['image_id']}")
        if _need_int(a, "category_id", where) not in cats:
            raise UserError(f"{where}: unknown category_id {a['category_id']}")
        im = images[a["image_id"]]
        box = a.get("bbox")
        if not (isinstance(box, list) and len(box) == 4 and all(_is_number(v) for v in box)):
            raise UserError(f"{where}: bbox must be [x, y, w, h] numbers, got {_short_repr(box)}")
        check_box(*box, im["width"], im["height"], where)
        area = a.get("area", box[2] * box[3])
        if not _is_number(area) or area < 0:
            raise UserError(f"{where}: area must be a number >= 0, got {_short_repr(area)}")
        crowd = a.get("iscrowd", 0)
        if crowd not in (0, 1):
            raise UserError(f"{where}: iscrowd must be 0 or 1, got {_short_repr(crowd)}")
        anns.append({"id": a["id"], "image_id": a["image_id"], "category_id": a["category_id"],
                     "bbox": [float(v) for v in box], "area": float(area), "iscrowd": int(crowd)})
    return {"images": list(images.values()), "annotations": anns, "categories": list(cats.values())}


_NO_AREA = object()  # an annotation without "area" (its box's w x h is used)


def _clean_annotations(anns: list, images: dict, cats: dict):
    """The clean annotation list when every entry passes validate_coco's checks, else None.

    The same checks as the entry-by-entry loop, on whole columns at once (a large set has
    tens of thousands of boxes); on None the loop runs and words the first problem.
    """
    if not all(type(a) is dict for a in anns):
        return None
    try:
        ids = [a["id"] for a in anns]
        img = [a["image_id"] for a in anns]
        cat = [a["category_id"] for a in anns]
        boxes = [a["bbox"] for a in anns]
        areas = [a.get("area", _NO_AREA) for a in anns]
        crowds = [a.get("iscrowd", 0) for a in anns]
        if (not set(map(type, chain(ids, img, cat))) <= {int} or len(set(ids)) != len(ids)
                or not set(img) <= images.keys() or not set(cat) <= cats.keys()
                or not set(map(type, boxes)) <= {list} or not set(map(len, boxes)) <= {4}
                or not set(map(type, chain.from_iterable(boxes))) <= {int, float}
                or not set(map(type, areas)) <= {int, float, object}  # object: _NO_AREA
                or not set(crowds) <= {0, 1}):
            return None
        if ids and not (min(chain(ids, img, cat)) >= -INT_LIMIT and max(chain(ids, img, cat)) < INT_LIMIT):
            return None  # an id beyond 64 bits: the entry-by-entry check names it
        box = np.array(boxes, dtype=np.float64).reshape(-1, 4)
        size = np.array([(images[i]["width"], images[i]["height"]) for i in img], dtype=np.float64).reshape(-1, 2)
        area = np.array([box[j, 2] * box[j, 3] if v is _NO_AREA else v for j, v in enumerate(areas)], np.float64)
    except (KeyError, TypeError, OverflowError):  # a missing key, an unhashable iscrowd, a huge number
        return None
    x, y, w, h = box.T
    t = BOX_TOLERANCE
    if not (np.isfinite(box).all() and np.isfinite(area).all() and (area >= 0).all()
            and (w > 0).all() and (h > 0).all() and (x >= -t).all() and (y >= -t).all()
            and (x + w <= size[:, 0] + t).all() and (y + h <= size[:, 1] + t).all()):
        return None
    return [{"id": i, "image_id": m, "category_id": c, "bbox": b, "area": float(ar), "iscrowd": int(cr)}
            for i, m, c, b, ar, cr in zip(ids, img, cat, box.tolist(), area.tolist(), crowds)]


def check_box(x, y, w, h, width, height, where):
    """A box [x, y, w, h] must have positive size and lie inside the image (within tolerance)."""
    if w < 0 or h < 0:
        raise UserError(f"{where}: box {[x, y, w, h]} has negative size")
    if w == 0 or h == 0:
        raise UserError(f"{where}: box {[x, y, w, h]} has zero area")
    t = BOX_TOLERANCE
    if x < -t or y < -t or x + w > width + t or y + h > height + t:
        raise UserError(f"{where}: box {[x, y, w, h]} lies outside the {width}x{height} image")


def _record(im: dict, root: Path, source) -> ImageRecord:
    name = im["file_name"]
    if "\0" in name or any(len(part.encode("utf-8", "replace")) > 255 for part in Path(name).parts):
        raise UserError(f"{source}: image {im['id']}: file_name {name[:60]!r} is not a usable file name")
    base = root.resolve()
    path = (base / name).resolve()
    if Path(name).is_absolute() or not path.is_relative_to(base):
        raise UserError(f"{source}: image {im['id']}: file_name {name!r} leads outside the "
                        f"dataset root {root}; refused")
    return ImageRecord(im["id"], name, path, im["width"], im["height"])


def _check_image(rec: ImageRecord, source, max_pixels: int = DEFAULT_MAX_PIXELS):
    if not rec.path.is_file():
        raise UserError(f"{source}: image {rec.id}: missing image file {rec.path}")
    try:
        pixels = read_image(rec.path, max_pixels)
    except UserError as exc:
        raise UserError(f"{source}: image {rec.id}: {exc}") from None
    h, w = pixels.shape[:2]
    if (w, h) != (rec.width, rec.height):
        raise UserError(f"{source}: image {rec.id}: {rec.file_name} is {w}x{h} but the "
                        f"annotations say {rec.width}x{rec.height}")


def _voc_to_coco(folder: Path) -> dict:
    import xml.etree.ElementTree as ET  # expat >= 2.4 refuses entity-expansion bombs

    files = sorted(folder.glob("*.xml"))
    if not files:
        raise UserError(f"{folder}: no .xml annotation files")
    parsed = []
    for f in files:
        try:
            node = ET.parse(f).getroot()
        except (ET.ParseError, OSError) as exc:
            raise UserError(f"{f}: not a readable Pascal VOC XML file ({exc})") from None
        try:
            name = node.findtext("filename").strip()
            width, height = (_voc_side(node.findtext(f"size/{k}"), f"{f}: size/{k}") for k in ("width", "height"))
            objects = []
            for j, obj in enumerate(node.findall("object")):
                where = f"{f}: object {j}"
                cls = (obj.findtext("name") or "").strip()
                if not cls:
                    raise UserError(f"{where}: missing name")
                try:
                    x1, y1, x2, y2 = (float(obj.findtext(f"bndbox/{k}"))
                                      for k in ("xmin", "ymin", "xmax", "ymax"))
                except (TypeError, ValueError):
                    raise UserError(f"{where}: bndbox needs numeric xmin, ymin, xmax, ymax") from None
                if not all(math.isfinite(v) for v in (x1, y1, x2, y2)):
                    raise UserError(f"{where}: bndbox values must be finite numbers")
                box = [x1 - 1, y1 - 1, x2 - x1 + 1, y2 - y1 + 1]
                check_box(*box, width, height, where)
                difficult = (obj.findtext("difficult") or "0").strip() == "1"
                objects.append((cls, box, difficult))
        except (AttributeError, TypeError, ValueError):
            raise UserError(f"{f}: needs filename and size/width, size/height") from None
        parsed.append((name, width, height, objects))
    names = sorted({o[0] for _, _, _, objs in parsed for o in objs})
    cat_id = {n: i + 1 for i, n in enumerate(names)}
    images, anns = [], []
    for i, (name, width, height, objects) in enumerate(parsed):
        images.append({"id": i + 1, "file_name": name, "width": width, "height": height})
        for cls, box, difficult in objects:
            anns.append({"id": len(anns) + 1, "image_id": i + 1, "category_id": cat_id[cls],
                         "bbox": box, "area": box[2] * box[3], "iscrowd": int(difficult)})
    return {"images": images, "annotations": anns,
            "categories": [{"id": cat_id[n], "name": n} for n in names]}


def _read_json(path: Path):
    return read_json(path, "annotation file")


def _voc_side(text, where: str) -> int:
    """A VOC size/width or size/height: a whole number of pixels in 1..MAX_SIDE (\"480.0\" is fine)."""
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise UserError(f"{where}: needs a number, got {text!r}") from None
    if not (math.isfinite(value) and value == int(value) and 0 < value <= MAX_SIDE):
        raise UserError(f"{where}: must be a whole number in 1..{MAX_SIDE}, got {text.strip()!r}")
    return int(value)


def _label(obj, i: int) -> str:
    """An entry's id for messages, or its list position when it has none."""
    if not isinstance(obj, dict) or "id" not in obj:
        return f"[{i}]"
    v = obj["id"]
    if isinstance(v, str) or (isinstance(v, int) and abs(v) < 10**30):
        return str(v)[:60]
    return _short_repr(v)


def _need_int(obj: dict, key: str, where: str) -> int:
    v = obj.get(key)
    if not isinstance(v, int) or isinstance(v, bool):
        raise UserError(f"{where}: {key} must be an integer, got {_short_repr(v)}")
    if not -INT_LIMIT <= v < INT_LIMIT:
        raise UserError(f"{where}: {key} must fit in 64 bits, got {_short_repr(v)}")
    return v


def _short_repr(v) -> str:
    try:
        text = repr(v)
    except ValueError:   # an int with more digits than Python prints
        return "<a huge integer>"
    return text if len(text) <= 60 else text[:57] + "..."


def _is_number(v) -> bool:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        return math.isfinite(v) and abs(v) < 1e15   # beyond any pixel coordinate; keeps w*h finite
    except OverflowError:   # an int too large for a float
        return False


def _norm(name) -> str:
    return "".join(ch for ch in str(name).lower() if ch not in " \t-_")


def _sample(names, k: int = 5) -> str:
    names = list(names)
    shown = ", ".join(repr(n) for n in names[:k])
    return f"[{shown}{', ...' if len(names) > k else ''}] ({len(names)})"
