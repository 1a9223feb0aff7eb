"""INT8 graphs: static QDQ quantisation of an exported fp32 graph with onnxruntime.quantization.

What is done, in order (the settings are QuantSettings; each is recorded in the int8 graph's
export record and is part of its cache key):

1. Pre-processing (`quant_pre_process`): ONNX Runtime's basic graph optimisation, then ONNX
   shape inference, so that the quantiser knows the tensors' types and ranks. Its symbolic
   shape inference is skipped: it stops at the data-dependent shapes after NMS in every
   detector graph we export ("Incomplete symbolic shape inference"); ONNX's own inference is
   enough for the ops we quantise.
2. Calibration: the fp32 graph runs on the calibration images (never the held-out set: the
   caller passes a separate dataset, and both fingerprints are kept) and the activation
   ranges at the inputs and outputs of the quantised nodes are collected with `method`:
     minmax     - the observed minimum and maximum (ONNX Runtime's default);
     entropy    - the range that minimises the KL divergence between the fp32 and the
                  8-bit histograms;
     percentile - the range that covers 99.999 % of the observed values (ORT's default
                  percentile), so a few outliers do not stretch the scale.
3. Quantisation (`quantize_static`, QDQ format): QuantizeLinear / DequantizeLinear pairs
   around the nodes of `op_types` only (default Conv, MatMul, Gemm: where the arithmetic is).
   Activations uint8 (asymmetric), weights int8, per output channel when `per_channel`
   (default true); `reduce_range` (default false) stores weights in 7 bits, which ONNX
   Runtime suggests for CPUs without VNNI when 8-bit products saturate. Every other node -
   box decoding, NMS, the If/Loop control-flow subgraphs, resizing - stays fp32; ONNX Runtime
   then fuses each DQ -> Conv -> Q group into an integer kernel at session start.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import tempfile
import time
from collections import Counter
from pathlib import Path

from speedbench import schema
from speedbench.errors import UserError
from speedbench.export.onnx_export import (ExportRecord, _first_line, _write_record, attach_scopes,
                                           installed_version)

PRECISIONS = schema.PRECISIONS
METHODS = schema.QUANT_METHODS
QUANTISABLE_OPS = schema.QUANT_OP_TYPES
QUANT_FORMAT = 1     # bump when the quantisation procedure or the int8 record changes


@dataclasses.dataclass(frozen=True)
class QuantSettings:
    method: str = "minmax"
    per_channel: bool = True
    op_types: tuple = QUANTISABLE_OPS
    reduce_range: bool = False

    def __post_init__(self):
        if self.method not in METHODS:
            raise UserError(f"quantisation method must be one of {', '.join(METHODS)}, not {self.method!r}")
        bad = [op for op in self.op_types if op not in QUANTISABLE_OPS]
        if bad or not self.op_types:
            raise UserError(f"quantisation op_types must be a non-empty subset of {', '.join(QUANTISABLE_OPS)}"
                            f"{f', not {bad[0]!r}' if bad else ''}")

    def to_dict(self) -> dict:
        return {"method": self.method, "per_channel": self.per_channel,
                "op_types": list(self.op_types), "reduce_range": self.reduce_range}


class _Reader:
    """onnxruntime's CalibrationDataReader protocol over a list of uint8 images."""

    def __init__(self, images):
        from speedbench.data import to_input

        self._inputs = iter([{"image": to_input(img)} for img in images])

    def get_next(self):
        return next(self._inputs, None)

    def rewind(self):   # part of the protocol; calibration reads the images once
        pass


def quantise_key(fp32: ExportRecord, settings: QuantSettings, calibration_fingerprint: str) -> str:
    key = {"fp32_sha256": fp32.facts.get("onnx_sha256"), "settings": settings.to_dict(),
           "calibration": calibration_fingerprint, "onnxruntime": installed_version("onnxruntime"),
           "onnx": installed_version("onnx"), "format": QUANT_FORMAT}
    return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()


def quantise_graph(fp32: ExportRecord, settings: QuantSettings, calibration, cache_dir=None,
                   calibration_source: str = "") -> ExportRecord:
    """The int8 graph of an fp32 export (cached by content), with its own export record.

    calibration: a dataset (speedbench.data.Dataset: .images, .read(id), .fingerprint) that
    must not be the held-out set; its fingerprint is part of the cache key and the record.
    A quantiser failure comes back as ok=False with its reason (the sweep goes on).
    """
    if not fp32.ok:
        raise ValueError("quantise_graph needs a successful fp32 export")
    if not len(calibration.images):
        raise UserError(f"{calibration_source or 'calibration'}: the calibration set has no images")
    fingerprint = str(calibration.fingerprint)
    digest = quantise_key(fp32, settings, fingerprint)
    root = Path(cache_dir) if cache_dir else Path(fp32.path).parent
    root.mkdir(parents=True, exist_ok=True)
    stem = f"{Path(fp32.path).stem}-int8-{digest[:12]}"
    onnx_path, json_path = root / f"{stem}.onnx", root / f"{stem}.json"
    cached = _cached(json_path, onnx_path)
    if cached is not None:
        return cached

    started = time.perf_counter()
    record = ExportRecord.from_dict({**fp32.to_dict(), "path": str(onnx_path), "digest": digest,
                                     "parity": {}, "notes": list(fp32.notes or [])})
    record.precision = "int8"
    record.versions = {**(fp32.versions or {}), "onnxruntime": installed_version("onnxruntime")}
    record.quantisation = {
        **settings.to_dict(), "format": "QDQ", "activations": "uint8 (asymmetric)",
        "weights": "int8 per channel" if settings.per_channel else "int8 per tensor",
        "shape_inference": "onnx (symbolic skipped: data-dependent shapes after NMS)",
        "calibration": {"fingerprint": fingerprint, "images": len(calibration.images),
                        "source": calibration_source},
        "fp32_digest": fp32.digest, "fp32_sha256": fp32.facts.get("onnx_sha256"),
    }
    images = [calibration.read(rec.id) for rec in calibration.images]
    try:
        _quantise_file(Path(fp32.path), onnx_path, settings, images)
    except Exception as exc:  # a quantiser failure is recorded: the fp32 points are unaffected
        record.ok, record.reason = False, f"quantisation failed: {_first_line(exc)}"
        record.facts = {k: v for k, v in (fp32.facts or {}).items() if k != "onnx_sha256"}
        record.seconds = round(time.perf_counter() - started, 2)
        _write_record(record, json_path)
        return record
    from speedbench.zoo.weights import sha256_file

    facts = {k: v for k, v in (fp32.facts or {}).items() if k not in ("onnx_sha256", "onnx_mib")}
    facts.update(graph_summary(onnx_path, settings.op_types))
    facts.update(weight_storage(Path(fp32.path), onnx_path))
    facts["onnx_mib"] = round(onnx_path.stat().st_size / 2**20, 3)
    facts["onnx_sha256"] = sha256_file(onnx_path)
    record.facts = facts
    # Parity with torch does not apply: int8 is meant to differ. Agreement with the fp32
    # graph on the calibration images is what the record keeps instead (the sweep adds the
    # agreement on the held-out images to each row).
    record.parity = {"kind": "agreement with the fp32 graph (calibration images)",
                     **agreement(_detect(Path(fp32.path), images), _detect(onnx_path, images))}
    record.notes.append("int8: detections differ from fp32 by design; compare its mAP change [CI] and its "
                        "agreement with fp32 before a safety-relevant deployment")
    record.seconds = round(time.perf_counter() - started, 2)
    _write_record(record, json_path)
    return record


def _quantise_file(src: Path, dst: Path, settings: QuantSettings, images) -> None:
    """Run the quantiser in a child process whose working directory is a temporary one.

    ORT's calibrator leaves an external-data file in the current directory; a child with its
    own directory keeps that away from the caller (and a quantiser crash away from the sweep).
    """
    import subprocess
    import sys

    import numpy as np

    with tempfile.TemporaryDirectory(dir=dst.parent) as tmp:
        np.savez(Path(tmp) / "images.npz", *images)
        (Path(tmp) / "settings.json").write_text(json.dumps(settings.to_dict()))
        done = subprocess.run([sys.executable, "-m", "speedbench.export.quantise", str(src), str(Path(tmp) / "int8.onnx")],
                              cwd=tmp, capture_output=True, text=True)
        if done.returncode != 0:
            tail = (done.stderr.strip().splitlines() or [f"exit status {done.returncode}"])[-1]
            raise RuntimeError(tail[-300:])
        os.replace(Path(tmp) / "int8.onnx", dst)


def _quantise_here(src: str, dst: str) -> None:
    """The child's side: settings.json and images.npz in the working directory."""
    import numpy as np
    import onnx
    from onnxruntime.quantization import CalibrationMethod, QuantFormat, QuantType, quantize_static
    from onnxruntime.quantization.shape_inference import quant_pre_process

    s = json.loads(Path("settings.json").read_text())
    with np.load("images.npz") as z:
        images = [z[k] for k in sorted(z.files, key=lambda k: int(k.split("_")[1]))]
    methods = {"minmax": CalibrationMethod.MinMax, "entropy": CalibrationMethod.Entropy,
               "percentile": CalibrationMethod.Percentile}
    quant_pre_process(src, "pre.onnx", skip_symbolic_shape=True)
    quantize_static("pre.onnx", dst, _Reader(images), quant_format=QuantFormat.QDQ,
                    op_types_to_quantize=list(s["op_types"]), per_channel=s["per_channel"],
                    reduce_range=s["reduce_range"], activation_type=QuantType.QUInt8,
                    weight_type=QuantType.QInt8, calibrate_method=methods[s["method"]])
    # The weights' DequantizeLinear nodes are named after the weight, not a module scope:
    # give them their consumer's scope so stage attribution sees them (names only change).
    proto = onnx.load(dst)
    attach_scopes(proto.graph)
    onnx.save(proto, dst)
    onnx.checker.check_model(dst)


def _cached(json_path: Path, onnx_path: Path) -> ExportRecord | None:
    from speedbench.export.onnx_export import _cached as cached_fp32

    return cached_fp32(json_path, onnx_path)


# ----------------------------------------------------------------- what the graph holds
def _walk(graph, inside: bool = False):
    """(node, inside_a_subgraph) for every node, If/Loop bodies included."""
    for node in graph.node:
        yield node, inside
        for attr in node.attribute:
            if attr.type == attr.GRAPH:
                yield from _walk(attr.g, True)
            for g in attr.graphs:
                yield from _walk(g, True)


def graph_summary(path, op_types=QUANTISABLE_OPS) -> dict:
    """Which nodes got quantised: counts by op type, Q/DQ nodes, what stayed fp32."""
    import onnx

    proto = onnx.load(str(path))
    g = proto.graph
    producer = {o: n for n in g.node for o in n.output}
    quantised, fp32_heavy = Counter(), Counter()
    for node in g.node:
        if node.op_type in op_types:
            # quantised = its weight (input 1) comes from a DequantizeLinear
            src = producer.get(node.input[1]) if len(node.input) > 1 else None
            (quantised if src is not None and src.op_type == "DequantizeLinear" else fp32_heavy)[node.op_type] += 1
    qdq_in_subgraphs = sum(1 for n, inside in _walk(g) if inside and n.op_type in ("QuantizeLinear", "DequantizeLinear"))
    return {"quantised_nodes": dict(quantised), "fp32_compute_nodes": dict(fp32_heavy),
            "quantize_linear": sum(n.op_type == "QuantizeLinear" for n in g.node),
            "dequantize_linear": sum(n.op_type == "DequantizeLinear" for n in g.node),
            "qdq_in_subgraphs": qdq_in_subgraphs}


def weight_storage(fp32_path, int8_path) -> dict:
    """Bytes of the quantised weights: fp32 tensors vs their int8 tensors plus scales and zero points."""
    import onnx
    from onnx import numpy_helper

    f32 = {t.name: t for t in onnx.load(str(fp32_path)).graph.initializer}
    q = onnx.load(str(int8_path)).graph
    inits = {t.name: t for t in q.initializer}
    fp32_bytes = int8_bytes = 0
    for node in q.node:
        if node.op_type != "DequantizeLinear" or node.input[0] not in inits:
            continue
        weight = inits[node.input[0]]
        original = weight.name.removesuffix("_quantized")
        if original not in f32 or numpy_helper.to_array(weight).dtype.itemsize != 1:
            continue   # biases are stored as int32; only 8-bit weights are counted here
        fp32_bytes += numpy_helper.to_array(f32[original]).nbytes
        int8_bytes += sum(numpy_helper.to_array(inits[n]).nbytes for n in node.input if n in inits)
    return {"weights_fp32_bytes": fp32_bytes, "weights_int8_bytes": int8_bytes}


# ----------------------------------------------------------------- agreement with fp32
def _detect(path: Path, images) -> list:
    from speedbench.data import to_input
    from speedbench.export.onnx_export import ort_session

    session = ort_session(path)
    out = []
    for img in images:
        boxes, scores, labels = session.run(None, {"image": to_input(img)})[:3]
        out.append((boxes, scores, labels))
    return out


def agreement(fp32_dets: list, int8_dets: list) -> dict:
    """How far int8 detections agree with fp32 ones on the same images.

    Per image, detections are matched greedily by label and IoU >= 0.5 (export.parity.match,
    fp32's best score first). matched_fraction = matched pairs / the larger of the two
    detection counts, summed over images; box differences are over matched pairs (pixels of
    the input image).
    """
    import numpy as np

    from speedbench.export.parity import match

    matched = total = 0
    diffs = []
    for ref, other in zip(fp32_dets, int8_dets):
        ref = tuple(np.asarray(a) for a in ref)
        other = tuple(np.asarray(a) for a in other)
        pairs = match(ref, other, box_tol=0.0)
        matched += len(pairs)
        total += max(len(ref[1]), len(other[1]))
        diffs.extend(float(np.abs(ref[0][i] - other[0][j]).max()) for i, j in pairs)
    return {"images": len(fp32_dets), "detections": total, "matched": matched,
            "matched_fraction": (matched / total) if total else None,
            "box_max_abs_diff_px": max(diffs) if diffs else None,
            "box_mean_abs_diff_px": (sum(diffs) / len(diffs)) if diffs else None}


if __name__ == "__main__":
    import sys

    _quantise_here(sys.argv[1], sys.argv[2])
