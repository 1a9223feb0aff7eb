"""Held-out accuracy of a demo model in eager PyTorch, scored with the COCO protocol.

Used by the training script to fill the manifest and by the tests to check the
committed weights. The held-out scenes are rendered in memory from the same seed
stream `speedbench scenes --split heldout` writes, so no files are needed.
"""
from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path


from speedbench.data.scenes import SCENE_CLASSES, render_scene, scene_rng

WEIGHTS_DIR = Path(__file__).resolve().parent.parent / "zoo" / "weights"


def heldout_scenes(n: int, seed: int = 0, size: tuple[int, int] = (320, 320)):
    """(images, COCO dataset dict) of the first n held-out scenes."""
    images, coco_images, anns = [], [], []
    for i in range(n):
        image, objs = render_scene(scene_rng(seed, "heldout", i), size[0], size[1])
        images.append(image)
        coco_images.append({"id": i + 1, "file_name": f"heldout_{i:05d}", "width": size[0], "height": size[1]})
        for a in objs:
            anns.append({"id": len(anns) + 1, "image_id": i + 1, **a})
    cats = [{"id": k + 1, "name": c} for k, c in enumerate(SCENE_CLASSES)]
    return images, {"images": coco_images, "annotations": anns, "categories": cats}


def predict(model, images, batch: int = 8):
    """Run an eager torchvision detector (eval mode) over uint8 images; COCO result dicts."""
    import torch

    model.eval()
    results = []
    with torch.inference_mode():
        for start in range(0, len(images), batch):
            chunk = [torch.from_numpy(im).permute(2, 0, 1).float().div_(255) for im in images[start:start + batch]]
            for k, out in enumerate(model(chunk)):
                boxes = out["boxes"].numpy()
                for (x1, y1, x2, y2), s, lab in zip(boxes, out["scores"].numpy(), out["labels"].numpy()):
                    if lab < 1:
                        continue
                    results.append({"image_id": start + k + 1, "category_id": int(lab),
                                    "bbox": [float(x1), float(y1), float(x2 - x1), float(y2 - y1)],
                                    "score": float(s)})
    return results


def coco_scores(dataset: dict, results: list) -> dict:
    """COCO-protocol summary with pycocotools' COCOeval (the reference implementation)."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO()
        gt.dataset = json.loads(json.dumps(dataset))
        gt.createIndex()
        if not results:
            return {"map": 0.0, "map50": 0.0, "map75": 0.0, "map_small": 0.0,
                    "map_medium": 0.0, "map_large": 0.0, "n_images": len(dataset["images"])}
        dt = gt.loadRes(results)
        ev = COCOeval(gt, dt, "bbox")
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    s = [max(0.0, float(v)) for v in ev.stats]  # -1 means "no such objects"; report 0
    return {"map": s[0], "map50": s[1], "map75": s[2], "map_small": s[3], "map_medium": s[4],
            "map_large": s[5], "n_images": len(dataset["images"])}


def heldout_accuracy(model, n: int = 100, seed: int = 0) -> dict:
    images, dataset = heldout_scenes(n, seed)
    return {k: (round(v, 4) if isinstance(v, float) else v)
            for k, v in coco_scores(dataset, predict(model, images)).items()}


def load_demo_model(model_id: str, weights_dir=None, **build_kwargs):
    """Build a compact demo model and load its committed fp16 weights (strict)."""
    import torch

    from speedbench.errors import UserError
    from speedbench.zoo import compact

    weights_dir = Path(weights_dir) if weights_dir else WEIGHTS_DIR
    manifest = json.loads((weights_dir / "manifest.json").read_text())
    entry = manifest["models"].get(model_id)
    if entry is None:
        raise UserError(f"{weights_dir / 'manifest.json'}: no demo weights for {model_id!r}")
    model = compact.BUILDERS[model_id](num_classes=entry["num_classes"], **build_kwargs)
    state = torch.load(weights_dir / entry["file"], map_location="cpu", weights_only=True)
    model.load_state_dict({k: v.float() if v.is_floating_point() else v for k, v in state.items()}, strict=True)
    return model.eval(), entry
