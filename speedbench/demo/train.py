"""Train the compact demo zoo from scratch on synthetic yard scenes.

    python -m speedbench.demo.train [--model ID|all] [--steps N] [--out DIR] [--seed S]

demo_ssdlite trains from random initialisation. The FPN models (FCOS and the two
Faster R-CNNs) then start their backbone from the one demo_ssdlite learned (same
MobileNetV3 layout), because a two-stage detector trained from scratch in minutes on
two cores learns nothing useful. Every scene is rendered on the fly from the train
seed stream, so a run is reproducible from (model, steps, batch, seed). Weights are
stored as fp16 state_dicts beside manifest.json, which records recipe, digest,
training time and held-out accuracy.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import sys
import time
from pathlib import Path

import numpy as np

from speedbench.data.scenes import SCENE_CLASSES, render_scene, scene_rng
from speedbench.demo.accuracy import WEIGHTS_DIR
from speedbench.errors import UserError

ORDER = ("demo_ssdlite", "demo_fcos", "demo_frcnn", "demo_frcnn_lite")

# Per-model recipe. "init": None = random; a model id = copy that model's trained backbone.
# "freeze": backbone.body layers kept as demo_ssdlite learned them. Layers 0-12 (strides
# 2-16) already carry detection features for these scenes, and no backward pass through
# the high-resolution layers makes a step several times cheaper.
_FROZEN = list(range(13))
# demo_ssdlite trains in two phases: the FPN models start from its backbone after phase 1
# (kept as demo_ssdlite.phase1.pt), so they can train while phase 2 continues on fresh scenes.
_BASE = "demo_ssdlite.phase1"
RECIPES = {
    # Phase 2 draws each batch's input size from "sizes" so the model also works below its
    # native 320 px (trained at 320 only it collapsed at 256: mAP 0.38 -> 0.13).
    "demo_ssdlite": {"steps": 260, "batch": 8, "lr": 3e-3, "init": None, "freeze": [],
                     "second": {"steps": 600, "lr": 1.5e-3, "sizes": [256, 288, 320, 352]}},
    "demo_fcos": {"steps": 200, "batch": 8, "lr": 2e-3, "init": _BASE, "freeze": _FROZEN},
    "demo_frcnn": {"steps": 200, "batch": 8, "lr": 2e-3, "init": _BASE, "freeze": _FROZEN},
    "demo_frcnn_lite": {"steps": 400, "batch": 8, "lr": 2e-3, "init": _BASE, "freeze": _FROZEN},
}
COMMON = {"optimizer": "AdamW", "weight_decay": 1e-4, "schedule": "one-cycle (cosine), 15% warm-up",
          "grad_clip": 5.0, "augment": "horizontal flip p=0.5", "image_size": [320, 320]}
HELDOUT_IMAGES = 100
CHECK_IMAGES = 40


def batch_targets(rng_flip: np.random.Generator, seed: int, start: int, batch: int):
    """Render train scenes start..start+batch-1 as (images, targets) tensors for torchvision."""
    import torch

    images, targets = [], []
    for i in range(start, start + batch):
        image, anns = render_scene(scene_rng(seed, "train", i))
        boxes = np.array([[a["bbox"][0], a["bbox"][1], a["bbox"][0] + a["bbox"][2], a["bbox"][1] + a["bbox"][3]]
                          for a in anns if not a["iscrowd"]], dtype=np.float32).reshape(-1, 4)
        labels = np.array([a["category_id"] for a in anns if not a["iscrowd"]], dtype=np.int64)
        if rng_flip.random() < 0.5:
            image = image[:, ::-1]
            w = image.shape[1]
            boxes = np.stack([w - boxes[:, 2], boxes[:, 1], w - boxes[:, 0], boxes[:, 3]], axis=1)
        images.append(torch.from_numpy(np.ascontiguousarray(image)).permute(2, 0, 1).float().div_(255))
        targets.append({"boxes": torch.from_numpy(boxes), "labels": torch.from_numpy(labels)})
    return images, targets


def transfer_backbone(source_state: dict, model) -> int:
    """Copy demo_ssdlite's MobileNetV3 weights into an FPN model's backbone.body.

    SSDlite splits the same features Sequential into two parts but keeps module order,
    so the tensors pair up one to one in order; every pair's shape is checked.
    """
    src = [(k, v) for k, v in source_state.items()
           if k.startswith("backbone.features.") and not k.endswith("num_batches_tracked")]
    dst = [k for k in model.state_dict() if k.startswith("backbone.body.")]
    if len(src) < len(dst):
        raise ValueError(f"source backbone has {len(src)} tensors, target needs {len(dst)}")
    target = model.state_dict()
    new = {}
    for (sk, sv), dk in zip(src, dst):
        if tuple(sv.shape) != tuple(target[dk].shape):
            raise ValueError(f"backbone transfer: {sk} {tuple(sv.shape)} does not fit {dk} {tuple(target[dk].shape)}")
        new[dk] = sv.float()
    model.load_state_dict(new, strict=False)
    return len(new)


def train_model(model_id: str, steps: int | None = None, batch: int | None = None, seed: int = 0,
                out_dir=None, log=print, init_state: dict | None = None, lr: float | None = None,
                resume_state: dict | None = None, first_scene: int = 0, sizes=None):
    """Train one model; returns (model, info) where info has losses, seconds, recipe.

    resume_state: a full state_dict to continue from (phase 2); first_scene: index of the
    first train scene, so a continuation sees scenes the first phase did not; sizes: input
    sizes drawn per batch (multi-scale training), None = the native size only.
    """
    import torch

    from speedbench.zoo.build import configure
    from speedbench.zoo.compact import BUILDERS, NUM_CLASSES

    if model_id not in RECIPES:
        raise UserError(f"--model must be one of {', '.join(ORDER)} or all, not {model_id!r}")

    recipe = {k: v for k, v in RECIPES[model_id].items() if k != "second"}
    recipe.update(COMMON, seed=seed, threads=torch.get_num_threads())
    if steps is not None:
        recipe["steps"] = steps
    if batch is not None:
        recipe["batch"] = batch
    if lr is not None:
        recipe["lr"] = lr
    if sizes:
        recipe["train_sizes"] = list(sizes)
        recipe["augment"] += "; input size drawn per batch from " + "/".join(map(str, sizes)) + " px"
    if recipe["steps"] <= 0 or recipe["batch"] <= 0:
        raise UserError(f"--steps and batch must be positive, not {recipe['steps']}/{recipe['batch']}")
    torch.manual_seed(seed)
    model = BUILDERS[model_id](num_classes=NUM_CLASSES)
    source = recipe["init"]
    if resume_state is not None:
        model.load_state_dict({k: v.float() if v.is_floating_point() else v for k, v in resume_state.items()})
        recipe["init"] = "continued from the first phase's weights"
        recipe["first_scene"] = first_scene
    elif source is not None:
        if init_state is None:
            path = Path(out_dir or WEIGHTS_DIR) / f"{source}.pt"
            if not path.is_file():
                raise UserError(f"{path}: {model_id} starts from {source}'s backbone; "
                                f"train {source.split('.')[0]} first")
            init_state = torch.load(path, map_location="cpu", weights_only=True)
        n = transfer_backbone(init_state, model)
        recipe["init"] = f"backbone initialised from {source}'s trained backbone ({n} tensors), rest random"
        for layer in recipe["freeze"]:
            for p in model.backbone.body[str(layer)].parameters():
                p.requires_grad_(False)
    else:
        recipe["init"] = "random (torchvision default initialisation), no pretrained weights"
    model.train()
    params = [p for p in model.parameters() if p.requires_grad]
    opt = torch.optim.AdamW(params, lr=recipe["lr"], weight_decay=recipe["weight_decay"])
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=recipe["lr"], total_steps=recipe["steps"],
                                                pct_start=0.15)
    rng_flip = np.random.default_rng([seed, 99, first_scene])
    rng_size = np.random.default_rng([seed, 98, first_scene])
    losses = []
    wall0, cpu0 = time.perf_counter(), time.process_time()
    for step in range(recipe["steps"]):
        if sizes:   # the zoo's own size knob: the model's transform resizes every image of the batch
            configure(model, size=int(rng_size.choice(sizes)))
        images, targets = batch_targets(rng_flip, seed, first_scene + step * recipe["batch"], recipe["batch"])
        loss = sum(model(images, targets).values())
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(params, recipe["grad_clip"])
        opt.step()
        sched.step()
        losses.append(float(loss.detach()))
        if step % 20 == 0 or step == recipe["steps"] - 1:
            log(f"{model_id} step {step + 1}/{recipe['steps']} loss {np.mean(losses[-20:]):.3f} "
                f"({time.perf_counter() - wall0:.0f} s)")
    if sizes:
        configure(model)    # back to the native size
    info = {"recipe": recipe, "losses": losses,
            "train_seconds": round(time.perf_counter() - wall0, 1),
            "train_cpu_seconds": round(time.process_time() - cpu0, 1)}
    return model.eval(), info


def save_weights(model, model_id: str, info: dict, out_dir, heldout: dict) -> dict:
    """Write <id>.pt (fp16 state_dict) and merge its entry into manifest.json."""
    import torch

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    state = {k: (v.half() if v.is_floating_point() else v) for k, v in model.state_dict().items()}
    path = out / f"{model_id}.pt"
    torch.save(state, path)
    entry = {
        "file": path.name,
        "sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
        "builder": f"speedbench.zoo.compact.{model_id}",
        "num_classes": len(SCENE_CLASSES) + 1,
        "classes": ["__background__", *SCENE_CLASSES],
        "recipe": info["recipe"],
        "train_seconds": info["train_seconds"],
        "train_cpu_seconds": info["train_cpu_seconds"],
        "loss_first_last": [round(float(np.mean(info["losses"][:20])), 4),
                            round(float(np.mean(info["losses"][-20:])), 4)],
        "heldout": heldout,
        **({"phases": info["phases"]} if "phases" in info else {}),
        "torch": torch.__version__.split("+")[0],
        "storage": "fp16 state_dict (torch.save); load with torch.load(weights_only=True), cast to float32",
    }
    def merge(manifest):
        manifest["models"][model_id] = entry
        manifest["models"] = {k: manifest["models"][k] for k in sorted(manifest["models"], key=_order)}

    update_manifest(out, merge)
    return entry


def score_saved(model_id: str, out_dir=None, n: int = HELDOUT_IMAGES, check_n: int = CHECK_IMAGES) -> dict:
    """Score the *saved* fp16 weights on the held-out scenes and record the figures.

    "heldout" is the first n held-out scenes; "heldout_check" the first check_n of them,
    the subset tests/test_demo_zoo.py re-scores to prove the committed file still
    performs as recorded.
    """
    from speedbench.demo.accuracy import coco_scores, heldout_scenes, load_demo_model, predict

    out = Path(out_dir or WEIGHTS_DIR)
    model, _ = load_demo_model(model_id, out)
    images, dataset = heldout_scenes(n)
    results = predict(model, images)
    ids = set(range(1, check_n + 1))
    subset = {"images": dataset["images"][:check_n], "categories": dataset["categories"],
              "annotations": [a for a in dataset["annotations"] if a["image_id"] in ids]}
    figures = {
        "heldout": _rounded(coco_scores(dataset, results)),
        "heldout_check": _rounded(coco_scores(subset, [r for r in results if r["image_id"] in ids])),
    }
    update_manifest(out, lambda manifest: manifest["models"][model_id].update(figures))
    return figures


def _rounded(d):
    return {k: (round(v, 4) if isinstance(v, float) else v) for k, v in d.items()}


def update_manifest(out_dir, change) -> None:
    """Read-modify-write manifest.json under a lock (models may train in parallel processes)."""
    import fcntl

    out = Path(out_dir)
    mpath = out / "manifest.json"
    with open(out / ".manifest.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        manifest = json.loads(mpath.read_text()) if mpath.is_file() else {"models": {}}
        change(manifest)
        tmp = mpath.with_suffix(".tmp")
        tmp.write_text(json.dumps(manifest, indent=2) + "\n")
        tmp.replace(mpath)


def _order(model_id):
    return ORDER.index(model_id) if model_id in ORDER else len(ORDER)


def _two_phases(model_id, seed, out_dir, log, reuse_first: bool):
    """Phase 1 (saved as <id>.phase1.pt, the FPN models' backbone source), then phase 2."""
    import torch

    first = out_dir / f"{model_id}.phase1.pt"
    if reuse_first and first.is_file():
        # Phase 1 was trained earlier by this script; its figures are in the manifest entry.
        entry = json.loads((out_dir / "manifest.json").read_text())["models"][model_id]
        p1 = entry.get("phases", [entry])[0]
        info1 = {"recipe": p1["recipe"], "train_seconds": p1["train_seconds"],
                 "train_cpu_seconds": p1["train_cpu_seconds"]}
        state = torch.load(first, map_location="cpu", weights_only=True)
        log(f"{model_id}: reusing phase 1 from {first}")
    else:
        model, info1 = train_model(model_id, seed=seed, out_dir=out_dir, log=log)
        state = {k: (v.half() if v.is_floating_point() else v) for k, v in model.state_dict().items()}
        torch.save(state, first)
        info1 = {k: info1[k] for k in ("recipe", "train_seconds", "train_cpu_seconds")}
    second = RECIPES[model_id]["second"]
    start = info1["recipe"]["steps"] * info1["recipe"]["batch"]
    model, info2 = train_model(model_id, steps=second["steps"], lr=second["lr"], seed=seed, out_dir=out_dir,
                               log=log, resume_state=state, first_scene=start, sizes=second.get("sizes"))
    phases = [info1, {k: info2[k] for k in ("recipe", "train_seconds", "train_cpu_seconds")}]
    recipe = {**info1["recipe"], "steps": sum(p["recipe"]["steps"] for p in phases),
              "schedule": "two one-cycle phases: "
                          + " then ".join(f"{p['recipe']['steps']} steps at max lr {p['recipe']['lr']}"
                                          for p in phases),
              "augment": info2["recipe"]["augment"] + " (phase 2)",
              **({"train_sizes": info2["recipe"]["train_sizes"]} if "train_sizes" in info2["recipe"] else {}),
              "phase1_file": first.name,
              "phase1_sha256": hashlib.sha256(first.read_bytes()).hexdigest()}
    info = {"recipe": recipe, "losses": info2["losses"], "phases": phases,
            "train_seconds": round(sum(p["train_seconds"] for p in phases), 1),
            "train_cpu_seconds": round(sum(p["train_cpu_seconds"] for p in phases), 1)}
    return model, info


def train(models="all", steps=None, out_dir=None, seed: int = 0, heldout_images: int = HELDOUT_IMAGES,
          log=print, threads: int = 2, reuse_first: bool = False) -> dict:
    """Train, evaluate and save the requested models in dependency order; returns manifest entries."""
    import torch

    # One thread is the more efficient choice when the cores are shared with other jobs.
    torch.set_num_threads(threads)
    ids = list(ORDER) if models in ("all", None) else [models] if isinstance(models, str) else list(models)
    for m in ids:
        if m not in RECIPES:
            raise UserError(f"--model must be one of {', '.join(ORDER)} or all, not {m!r}")
    out_dir = Path(out_dir or WEIGHTS_DIR)
    entries = {}
    for m in sorted(ids, key=_order):
        if "second" in RECIPES[m] and steps is None:
            model, info = _two_phases(m, seed, out_dir, log, reuse_first)
        else:
            model, info = train_model(m, steps=steps, seed=seed, out_dir=out_dir, log=log)
        save_weights(model, m, info, out_dir, {})
        figures = score_saved(m, out_dir, n=heldout_images, check_n=min(CHECK_IMAGES, heldout_images))
        entries[m] = json.loads((out_dir / "manifest.json").read_text())["models"][m]
        log(f"{m}: {info['train_seconds']} s wall, {info['train_cpu_seconds']} s CPU, "
            f"heldout {figures['heldout']}")
    return entries


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m speedbench.demo.train", description=__doc__.split("\n\n")[0])
    p.add_argument("--model", default="all", help=f"one of {', '.join(ORDER)} or all")
    p.add_argument("--steps", type=int, default=None, help="override the recipe's step count")
    p.add_argument("--out", default=None, help=f"weights directory (default {WEIGHTS_DIR})")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--heldout-images", type=int, default=HELDOUT_IMAGES)
    p.add_argument("--threads", type=int, default=2, help="torch intra-op threads (default 2)")
    p.add_argument("--reuse-first-phase", action="store_true",
                   help="two-phase models: continue from an existing <id>.phase1.pt instead of retraining it")
    args = p.parse_args(argv)
    try:
        train(args.model, args.steps, args.out, args.seed, args.heldout_images,
              log=lambda s: print(s, flush=True), threads=args.threads, reuse_first=args.reuse_first_phase)
    except UserError as exc:
        print(f"speedbench: error: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
