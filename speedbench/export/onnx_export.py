"""ONNX export through the TorchScript exporter, cached by content hash, verified against eager."""
from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import os
import shutil
import tempfile
import time
import warnings
from pathlib import Path

from speedbench.errors import UserError
from speedbench.system import atomic_write
from speedbench.zoo import get_spec, weights_digest
from speedbench.zoo.weights import installed_version

EXPORT_FORMAT = 2          # bump when the graph layout or the record changes
MIN_OPSET, DEFAULT_OPSET = 11, 17
OUTPUTS = ("boxes", "scores", "labels")


@dataclasses.dataclass
class ExportRecord:
    path: str
    digest: str
    model_id: str
    size: int
    proposals: int
    weights: str
    opset: int
    parity: dict
    facts: dict
    ok: bool
    reason: str
    weights_digest: str = ""
    untrained: bool = False
    outputs: tuple = OUTPUTS
    versions: dict = dataclasses.field(default_factory=dict)
    notes: list = dataclasses.field(default_factory=list)
    seconds: float = 0.0
    precision: str = "fp32"     # "int8": a quantised copy of an fp32 export (export/quantise.py)
    quantisation: dict = dataclasses.field(default_factory=dict)   # int8: settings, calibration set

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["outputs"] = list(self.outputs)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "ExportRecord":
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in d.items() if k in names})


def default_cache_dir() -> Path:
    return Path(os.environ.get("SPEEDBENCH_CACHE") or Path.home() / ".cache" / "speedbench" / "exports")


def ort_session(path, intra_threads: int = 1):
    """An ONNX Runtime CPU session with its log spam turned down to errors."""
    import onnxruntime as ort

    ort.set_default_logger_severity(3)
    so = ort.SessionOptions()
    so.log_severity_level = 3
    so.intra_op_num_threads = intra_threads
    so.inter_op_num_threads = 1
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


def _check_opset(opset) -> int:
    try:
        value = int(opset)
    except (TypeError, ValueError):
        raise UserError(f"--opset must be a whole number, not {opset!r}") from None
    if MIN_OPSET <= value <= DEFAULT_OPSET:
        return value  # every onnx release we support knows these (no import on a cache hit)
    import onnx

    top = onnx.defs.onnx_opset_version()
    if not MIN_OPSET <= value <= top:
        raise UserError(f"--opset {value} is out of range: use {MIN_OPSET}..{top}")
    return value


def export_key(model_id, size, proposals, weights, opset, num_classes=None) -> tuple[str, str]:
    wd = weights_digest(model_id, weights)
    key = {"model": model_id, "weights_digest": wd, "size": size, "proposals": proposals,
           "opset": opset, "torch": installed_version("torch"), "torchvision": installed_version("torchvision"),
           "format": EXPORT_FORMAT}
    if num_classes is not None:
        key["num_classes"] = int(num_classes)
    return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest(), wd


@contextlib.contextmanager
def exportable(model):
    """Give the detector the graph's I/O: image [3, H, W] -> boxes, scores, labels (+ masks).

    The class is swapped rather than wrapped so that the detector stays the top module and
    its module scopes reach the ONNX node names unprefixed (/backbone/..., /rpn/...).
    """
    base = type(model)

    class Exportable(base):
        def forward(self, image):
            out = base.forward(self, [image])[0]
            extra = [out["masks"]] if "masks" in out else []
            return (out["boxes"], out["scores"], out["labels"], *extra)

    model.__class__ = Exportable
    try:
        yield model
    finally:
        model.__class__ = base


def _torch_export(model, path: Path, opset: int, size: int) -> list[str]:
    import torch

    from speedbench.zoo import pattern_image

    names = list(OUTPUTS) + (["masks"] if hasattr(model, "roi_heads") and model.roi_heads.has_mask() else [])
    h, w = max(32, size * 3 // 4), size
    x = torch.from_numpy(pattern_image(h, w, seed=3)).permute(2, 0, 1).float() / 255.0
    dyn = {"image": {1: "height", 2: "width"}, **{n: {0: "detections"} for n in names}}
    with exportable(model), torch.no_grad(), warnings.catch_warnings():
        warnings.simplefilter("ignore")   # tracer warnings about Python control flow are expected
        torch.onnx.export(model, (x,), str(path), input_names=["image"], output_names=names,
                          dynamic_axes=dyn, opset_version=opset, dynamo=False)
    import onnx

    proto = onnx.load(str(path))
    attach_scopes(proto.graph)
    onnx.save(proto, str(path))
    return names


def _scope_of(name: str) -> str | None:
    return name.rsplit("/", 1)[0] if name.startswith("/") else None


def attach_scopes(graph, inherited: str | None = None) -> int:
    """Give the exporter's unscoped nodes the module scope of the tensors they work on.

    The TorchScript exporter emits some nodes without a scope, notably torchvision's
    NonMaxSuppression and the If/shape checks around it ("NonMaxSuppression_4393"). Left so,
    NMS time - most of an untrained one-stage run - could not be attributed to a stage.
    Each such node takes the scope of the producer of its first scoped input (graph order
    is topological), else of its first scoped consumer; nodes inside If/Loop bodies take
    their parent's. Only node names change; the computation is untouched.
    """
    produced: dict[str, str] = {}
    pending = []
    renamed = 0
    for node in graph.node:
        scope = _scope_of(node.name)
        if scope is None:
            scope = next((produced[i] for i in node.input if i in produced), inherited)
            if scope is None:
                pending.append(node)
            else:
                node.name = f"{scope}/{node.name or node.op_type}"
                renamed += 1
        if scope is not None:
            for out in node.output:
                produced[out] = scope
        for attr in node.attribute:
            if attr.type == attr.GRAPH:
                renamed += attach_scopes(attr.g, scope)
    for node in pending:   # inputs came only from initializers/graph inputs: look downstream
        consumer = next((n for n in graph.node if set(node.output) & set(n.input)
                         and _scope_of(n.name) is not None), None)
        if consumer is not None:
            node.name = f"{_scope_of(consumer.name)}/{node.name or node.op_type}"
            renamed += 1
    return renamed


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0][:200] if text else ''}"


def _write_record(record: ExportRecord, json_path: Path) -> None:
    # A private temp file per writer: workers exporting the same graph may race here.
    atomic_write(json_path, json.dumps(record.to_dict(), indent=2, default=str))


def export_onnx(model_id, size=None, proposals=None, weights="none", opset=DEFAULT_OPSET, cache_dir=None,
                verify=True, out=None, force=False, num_classes=None) -> ExportRecord:
    """Export (or reuse) the graph of one (model, weights, size, proposals, opset); verify parity.

    A failed or diverging export comes back with ok=False and its reason; it is never copied
    to `out`. User mistakes (unknown model, bad size, unreadable weights) raise UserError.
    num_classes: for file:PATH checkpoints whose class count should not be inferred.
    """
    from speedbench.zoo.build import build_model, check_proposals, check_size
    from speedbench.zoo.weights import parse_weights

    spec = get_spec(model_id)
    size = check_size(spec, spec.native_size if size is None else size)
    proposals = check_proposals(spec, proposals) if proposals is not None else spec.default_proposals
    opset = _check_opset(opset)
    kind, _ = parse_weights(weights)
    digest, wdigest = export_key(model_id, size, proposals, weights, opset, num_classes)
    root = Path(cache_dir) if cache_dir else default_cache_dir()
    root.mkdir(parents=True, exist_ok=True)
    stem = f"{model_id}-s{size}-p{proposals}-o{opset}-{digest[:16]}"
    onnx_path, json_path = root / f"{stem}.onnx", root / f"{stem}.json"

    record = _cached(json_path, onnx_path) if not force else None
    if record is None or (verify and record.ok and not record.parity):
        started = time.perf_counter()
        model = build_model(model_id, weights=weights, size=size, proposals=proposals or None,
                            num_classes=num_classes)
        if record is None:
            record = ExportRecord(
                path=str(onnx_path), digest=digest, model_id=model_id, size=size, proposals=proposals,
                weights=str(weights), opset=opset, parity={}, facts={}, ok=True, reason="",
                weights_digest=wdigest, untrained=kind == "none",
                versions={"torch": installed_version("torch"), "torchvision": installed_version("torchvision")})
            _export_into(record, model, spec, onnx_path, opset, size)
        if record.ok and verify:
            _verify_into(record, model, spec, onnx_path, opset, size, proposals)
        if kind == "none" and not any(n.startswith("untrained") for n in record.notes):
            record.notes.append("untrained weights: accuracy is not reported, and postprocess/NMS time is "
                                "unrepresentative (untrained scores flood NMS)")
        record.seconds = round(time.perf_counter() - started, 2)
        _write_record(record, json_path)
    if out and record.ok:
        out = Path(out)
        out.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(onnx_path, out)
        copy = ExportRecord.from_dict({**record.to_dict(), "path": str(out)})
        _write_record(copy, out.with_suffix(".json"))
        return copy
    return record


def _cached(json_path: Path, onnx_path: Path) -> ExportRecord | None:
    if not json_path.is_file():
        return None
    try:
        record = ExportRecord.from_dict(json.loads(json_path.read_text()))
    except (ValueError, TypeError):
        return None     # a torn or foreign record: export again
    if record.ok:
        from speedbench.zoo.weights import sha256_file

        if not onnx_path.is_file() or sha256_file(onnx_path) != record.facts.get("onnx_sha256"):
            return None
    return record


def _export_into(record, model, spec, onnx_path, opset, size) -> None:
    from speedbench.export.facts import model_facts

    fd, name = tempfile.mkstemp(dir=onnx_path.parent, suffix=".onnx.tmp")
    os.close(fd)
    tmp = Path(name)
    try:
        record.outputs = tuple(_torch_export(model, tmp, opset, size))
        import onnx

        onnx.checker.check_model(str(tmp))
        os.replace(tmp, onnx_path)
    except Exception as exc:   # any exporter failure is recorded, not raised: the sweep goes on
        record.ok, record.reason = False, f"export failed: {_first_line(exc)}"
        return
    finally:
        if tmp.exists():
            tmp.unlink()
    from speedbench.zoo.weights import sha256_file

    record.facts = model_facts(spec.id, size, model=model, onnx_path=onnx_path)
    record.facts["onnx_sha256"] = sha256_file(onnx_path)


def _verify_into(record, model, spec, onnx_path, opset, size, proposals) -> None:
    from speedbench.export import parity
    from speedbench.zoo import configure

    images = parity.verification_images()
    original_thresh = _score_thresh(model)
    try:
        result = parity.check(model, ort_session(onnx_path), images,
                              spec.detections_per_img, _score_thresh(model))
        result["graph"] = "exported"
        if result["matched"] < parity.MIN_COMPARED:
            # Too few detections to say anything (untrained heads often score below the
            # threshold): export a copy with score threshold 0 - same ops, one constant
            # changed - and compare that, so parity is never judged on 0 vs 0.
            configure(model, size, proposals or None, score_thresh=0.0)
            with tempfile.TemporaryDirectory() as tmp:
                copy = Path(tmp) / "thresh0.onnx"
                _torch_export(model, copy, opset, size)
                low = parity.check(model, ort_session(copy), images, spec.detections_per_img, 0.0)
            configure(model, size, proposals or None, score_thresh=original_thresh)
            low["graph"] = "copy with score_thresh=0 (too few detections in the exported graph)"
            low["exported_graph"] = {k: v for k, v in result.items() if k != "per_image"}
            result = low
    except Exception as exc:
        record.ok, record.reason = False, f"verification failed to run: {_first_line(exc)}"
        record.parity = {"passed": False, "error": _first_line(exc)}
        return
    result["tolerances"] = {"box_px": parity.BOX_TOL_PX, "score": parity.SCORE_TOL,
                            "match_iou": parity.MATCH_IOU,
                            "max_unmatched_fraction": parity.MAX_UNMATCHED_FRACTION}
    result["images"] = [list(s) for s in parity.SHAPES]
    record.parity = result
    record.notes.append(f"parity was checked on {len(images)} generated images: it shows ONNX Runtime "
                        "computes what torch computes for this graph, not that its detections are accurate; "
                        "check accuracy on your own data before a safety-relevant deployment")
    if not result["passed"]:
        record.ok = False
        record.reason = "ONNX Runtime diverges from torch eager: " + (
            "; ".join(result["failures"]) or "no detections to compare")


def _score_thresh(model) -> float:
    return float(model.roi_heads.score_thresh if hasattr(model, "roi_heads") else model.score_thresh)

