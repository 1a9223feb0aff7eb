"""Prepare an interleaved run's graphs inside one environment (run with its own interpreter).

`python -m speedbench.sweep.env_graphs SPEC.json`, started by sweep/interleaved.py with each
environment's interpreter, so that the export (torch's exporter) and the scoring (that
environment's onnxruntime) are the environment's own. The spec names the profile, the graph
keys, where exported graphs go, and optionally `given` graph files to score instead of
exporting (one graph measured in both environments). Writes {key: PreparedGraph fields} as JSON.
"""
from __future__ import annotations

import dataclasses
import json
import sys
from pathlib import Path

from speedbench.sweep import run_setup
from speedbench.sweep.pipeline import GraphStore, PreparedGraph
from speedbench.sweep.plan import GraphKey, expand_plan
from speedbench.sweep.profile import parse_profile


def prepare(spec: dict) -> dict:
    profile = parse_profile(spec["profile_text"], spec["profile_source"])
    wanted = [GraphKey(*k) for k in spec["keys"]]
    dataset = run_setup.prepare_dataset(profile, Path(profile.cache))
    store = GraphStore(profile, dataset, spec["exports_dir"], spec.get("per_image_dir"),
                       status=lambda text: print(f"  {text}", file=sys.stderr, flush=True))
    given = {GraphKey(*json.loads(k)): v for k, v in (spec.get("given") or {}).items()}
    out = {}
    for planned in expand_plan(profile).points:
        key = planned.graph_key
        if key not in wanted or json.dumps(list(key)) in out:
            continue
        if key in given:
            graph = store.score(key, PreparedGraph(**given[key]))
        else:
            graph = store.prepare(planned)
        out[json.dumps(list(key))] = dataclasses.asdict(graph)
    return out


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    spec = json.loads(Path(argv[0]).read_text())
    out = prepare(spec)
    tmp = Path(spec["result"] + ".tmp")
    tmp.write_text(json.dumps(out, default=str))
    tmp.replace(spec["result"])
    return 0


if __name__ == "__main__":
    sys.exit(main())
