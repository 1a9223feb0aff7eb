"""`speedbench measure`: time one configuration in its own worker process."""
from __future__ import annotations

from speedbench.cli.args import float_in, int_in, output_file


def add_parser(subparsers):
    p = subparsers.add_parser(
        "measure", help="measure one configuration: latency distribution, stages, memory",
        description="Run one point (model, size, proposals, backend, threads) in a fresh worker process: "
                    "warm-up, adaptive repetitions until the median's CI is tight, a profiled pass for "
                    "per-stage times, and memory. Prints a summary; --json prints the flat row.")
    p.add_argument("graph", nargs="?", help="ONNX file (backend ort); omitted: exported with speedbench.export")
    p.add_argument("--model", help="zoo id (default: the graph's file name)")
    p.add_argument("--weights", default="none", help="none | torchvision | demo | file:PATH (default none)")
    p.add_argument("--size", type=int_in(0, 4096), default=0,
                   help="input size the model resizes to, 32..4096 (0 = the graph's / model's own)")
    p.add_argument("--proposals", type=int_in(0, 10_000), default=0,
                   help="proposal / candidate budget, 1..10000 (0 = default)")
    p.add_argument("--backend", choices=("ort", "eager", "synthetic"), default="ort")
    p.add_argument("--adapter", metavar="FILE", help="GRAPH is an external detector described by this adapter "
                   "(TOML; keys in speedbench/adapt/spec.py): host pre/postprocessing are timed with it")
    p.add_argument("--threads", type=int_in(0, 256), default=1, help="intra-op threads, 0..256 (0 = library default)")
    p.add_argument("--inter-threads", type=int_in(0, 256), default=1, help="inter-op threads, 0..256 (default 1)")
    p.add_argument("--mode", choices=("sequential", "parallel"), default="sequential", help="ORT execution mode")
    p.add_argument("--opt", choices=("disable", "basic", "extended", "all"), default="all",
                   help="ORT graph optimisation level (default all)")
    p.add_argument("--affinity", type=int_in(0, 1024), default=0, help="pin the worker to N cores (0 = no pinning)")
    p.add_argument("--no-spin", action="store_true",
                   help="ORT pool threads sleep instead of spinning while waiting for work (spin_wait off)")
    p.add_argument("--invocations", type=int_in(1, 1000), default=1,
                   help="measure in R fresh worker processes; R >= 2 gives intervals that include "
                        "process-to-process variation (default 1)")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--images", nargs="+", metavar="PATH", help="image files or folders to time on")
    src.add_argument("--dataset", help="COCO JSON / VOC folder; its images are used")
    src.add_argument("--scenes", type=int_in(1, 10_000), default=8, help="generated scenes to time on (default 8)")
    p.add_argument("--max-images", type=int_in(1, 10_000), default=16,
                   help="use at most this many images (default 16)")
    p.add_argument("--min-reps", type=int_in(1, 1_000_000), default=20)
    p.add_argument("--max-reps", type=int_in(1, 1_000_000), default=1000)
    p.add_argument("--max-seconds", type=float_in(0, 86400, open_lo=True), default=30.0,
                   help="timing budget per point, (0, 86400] (default 30)")
    p.add_argument("--rel-ci", type=float_in(0, 1, open_lo=True, open_hi=True), default=0.02,
                   help="stop when the median's 95%% CI half-width is within this fraction of the median, "
                        "(0, 1) (default 0.02)")
    p.add_argument("--no-stages", action="store_true", help="skip the profiled per-stage pass")
    p.add_argument("--timeout", type=float_in(1, 86400), default=600,
                   help="kill the worker after this many seconds, 1..86400 (default 600)")
    p.add_argument("--json", action="store_true", help="print the flat result row as JSON")
    p.add_argument("-o", "--out", type=output_file(".json"),
                   help="write the full result (every sample) as JSON to this file (.json)")
    p.set_defaults(run=run)


def _images(args):
    from pathlib import Path

    from speedbench.errors import UserError

    if args.images:
        exts = {".png", ".jpg", ".jpeg", ".bmp", ".ppm", ".tif", ".tiff", ".webp"}
        files = []
        for item in args.images:
            path = Path(item)
            if path.is_dir():
                files += sorted(f for f in path.iterdir() if f.suffix.lower() in exts)
            elif path.exists():
                files.append(path)
            else:
                raise UserError(f"{path}: image file or folder not found")
        if not files:
            raise UserError(f"{args.images[0]}: no image files found")
        return files[: args.max_images]
    if args.dataset:
        from speedbench.data import load_dataset

        ds = load_dataset(args.dataset)
        return [ds.read(rec["id"] if isinstance(rec, dict) else rec.id) for rec in ds.images[: args.max_images]]
    from speedbench.data.scenes import render_scene, scene_rng

    if args.scenes < 1:
        raise UserError("--scenes: need at least 1 image")
    return [render_scene(scene_rng(0, "heldout", i))[0] for i in range(min(args.scenes, args.max_images))]


def graph_size(graph: str) -> int | None:
    """The input size a graph was exported for: from its export record (GRAPH.json beside it,
    written by speedbench export), else from the cache's file name (MODEL-sSIZE-pK-oOPSET-...)."""
    import json
    import re
    from pathlib import Path

    record = Path(graph).with_suffix(".json")
    try:
        size = json.loads(record.read_text()).get("size")
        if isinstance(size, int) and not isinstance(size, bool):
            return size
    except (OSError, ValueError, AttributeError, RecursionError):
        pass
    m = re.search(r"-s(\d+)-p\d+-o\d+", Path(graph).stem)
    return int(m.group(1)) if m else None


def check_graph(graph: str) -> None:
    """A readable ONNX file, or a UserError naming it (a corrupt graph is bad input, not a failed point)."""
    from pathlib import Path

    from speedbench.errors import UserError

    path = Path(graph)
    if not path.is_file():
        raise UserError(f"{path}: ONNX graph file not found")
    try:
        import onnx

        onnx.load(str(path), load_external_data=False)
    except Exception as exc:  # onnx raises DecodeError, ValueError, OSError... for a damaged file
        raise UserError(f"{path}: not a readable ONNX graph ({type(exc).__name__})") from None


def _graph(args, model):
    from speedbench.errors import UserError

    if args.graph:
        check_graph(args.graph)
        exported = graph_size(args.graph)
        if exported is not None and args.size and args.size != exported:
            raise UserError(f"--size {args.size}: {args.graph} was exported for {exported} px (the size is "
                            f"part of the graph); export it at {args.size} px or leave --size out")
        if exported is not None:
            args.size = exported
        return args.graph
    from speedbench.export import export_onnx

    rec = export_onnx(model, size=args.size or None, proposals=args.proposals or None, weights=args.weights)
    if not rec.ok:
        raise UserError(f"export of {model} failed: {rec.reason}")
    return str(rec.path)


def run(args) -> int:
    from pathlib import Path

    from speedbench.errors import UserError
    from speedbench.measure import Point

    model = args.model or (Path(args.graph).stem if args.graph else None)
    if not model:
        raise UserError("--model: give a zoo id (or an ONNX file)")
    if args.size and args.size < 32:
        raise UserError(f"--size {args.size}: must be 0 (the graph's own) or 32..4096")
    if args.min_reps > args.max_reps:
        raise UserError(f"--max-reps {args.max_reps}: must be >= --min-reps {args.min_reps}")
    if args.adapter:
        return _run_point(args, _adapted_point(args, model))
    ort = args.backend == "ort"
    graph = _graph(args, model) if ort else None
    point = Point(model=model, weights=args.weights, size=args.size, proposals=args.proposals,
                  backend=args.backend, intra_threads=args.threads, inter_threads=args.inter_threads,
                  exec_mode=args.mode if ort else "", opt_level=args.opt if ort else "",
                  affinity=args.affinity, spin_wait="off" if args.no_spin else "on", graph=graph)
    return _run_point(args, point)


def _adapted_point(args, model):
    """Point for GRAPH + --adapter: backend "adapted", the adapter checked against the graph first."""
    from pathlib import Path

    from speedbench.adapt import check_graph, load_adapter
    from speedbench.errors import UserError
    from speedbench.measure import Point

    if not args.graph:
        raise UserError("--adapter: give the external ONNX graph it describes")
    if args.backend != "ort":
        raise UserError(f"--adapter: an external graph runs on ONNX Runtime, not --backend {args.backend}")
    adapter = load_adapter(args.adapter)
    check_graph(args.graph, adapter)
    if args.size and adapter.fixed and args.size != adapter.native_size:
        raise UserError(f"--size {args.size}: {args.graph} has a fixed input of "
                        f"{adapter.input.size[0]} x {adapter.input.size[1]}")
    if args.proposals and not adapter.host_nms:
        raise UserError("--proposals: NMS runs inside this graph (nms.enabled = false); there is no host top-k")
    size = args.size or adapter.native_size
    if not adapter.fixed and adapter.input.resize == "none":
        size = 0
    return Point(model=model, weights=f"onnx:{Path(args.graph).name}", size=size,
                 proposals=(args.proposals or adapter.nms.candidates) if adapter.host_nms else 0,
                 backend="adapted", intra_threads=args.threads, inter_threads=args.inter_threads,
                 exec_mode=args.mode, opt_level=args.opt, affinity=args.affinity, graph=args.graph,
                 spin_wait="off" if args.no_spin else "on",
                 adapter=adapter.to_dict())


def _run_point(args, point) -> int:
    import json
    import math
    import sys
    from pathlib import Path

    from speedbench.measure import Policy
    from speedbench.measure.launch import measure_invocations

    policy = Policy(min_reps=args.min_reps, max_reps=args.max_reps, max_seconds=args.max_seconds,
                    rel_ci=args.rel_ci, profile_stages=not args.no_stages)
    res = measure_invocations(point, _images(args), policy, invocations=args.invocations, timeout_s=args.timeout)
    if args.out:
        Path(args.out).write_text(json.dumps(res.to_dict(), indent=1))
    if args.json:
        row = res.to_row()
        print(json.dumps({k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in row.items()}))
    else:
        _print_summary(res)
    if not res.ok:
        print(f"speedbench: point failed: {res.reason}", file=sys.stderr)
        return 1
    return 0


def _print_summary(res) -> None:
    p = res.point
    print(f"{p.model} size={p.size or 'default'} proposals={p.proposals or 'default'} backend={p.backend} "
          f"threads={p.intra_threads}/{p.inter_threads}" + (f" affinity={p.affinity}" if p.affinity else ""))
    if not res.ok:
        print(f"  failed: {res.reason}")
        return
    m = res.measurement
    lo, hi = m.ci(50)
    print(f"  latency ms: p50 {m.median:.2f} (95% CI {lo:.2f}-{hi:.2f})  p90 {m.percentile(90):.2f}  "
          f"p99 {m.percentile(99):.2f}  min {m.min:.2f}  mean {m.mean:.2f}  CoV {m.cov:.3f}  n {m.n} "
          f"({res.extra.get('stop')}) on {res.extra.get('n_images')} images")
    scope = m.summary()
    print(f"  invocations {scope['invocations']}: {scope['ci_scope']}"
          + (f"; between-invocation CoV {scope['between_cov']:.1%}" if scope["invocations"] > 1 else ""))
    if res.failed_invocations:
        print(f"  failed invocations: {'; '.join(res.failed_invocations)}")
    if m.noisy:
        print("  NOISY: the spread is high or the CI target was not reached; do not rank on this point alone")
    if res.stages:
        total = sum(res.stages.values())
        print(f"  stages: share of a profiled run ({res.profiled_ms:.2f} ms, profiling overhead "
              f"{res.profiling_overhead * 100:+.0f}%) x unprofiled p50 {m.median:.2f} ms:")
        for stage, ms in sorted(res.stages.items(), key=lambda kv: -kv[1]):
            print(f"    {stage:<13} {ms / total * m.median:9.2f} ms  {ms / total * 100:5.1f}%  "
                  f"(profiled {ms:.2f} ms)")
    mem = res.memory
    print(f"  memory MiB: after imports {mem.get('rss_imports_mib', 0):.0f}, loaded {mem.get('rss_loaded_mib', 0):.0f}, "
          f"peak {mem.get('rss_peak_mib', 0):.0f} ({mem.get('peak_scope')}); model file {mem.get('model_file_mib', 0):.1f}")
    print(f"  timed region: {res.extra.get('timed_region')}")
    if p.weights in ("none", "untrained") and p.backend != "synthetic":
        print("  WARNING: untrained weights - their scores flood NMS, so postprocess time (and the total) is not "
              "what a trained model costs. Do not size a deployment on it.")
