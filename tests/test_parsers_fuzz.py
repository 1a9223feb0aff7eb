"""Parsers: property tests of every input parser with generated input (Hypothesis).

Profiles (TOML), COCO annotation JSON, Pascal VOC XML, detections JSON and the files of a
run directory (meta.json, the points rows, the samples) get arbitrary bytes, arbitrary
JSON / TOML / XML trees and valid files with one leaf replaced by an arbitrary value.
The only allowed outcomes are a parsed result or speedbench's UserError (one line, exit 2
at the CLI); any other exception is a crash and fails the test.

Bounds (README, "Bad input and bounds"): every test is derandomized (the same examples
on every machine, so CI is reproducible), keeps no example database, and runs at most
MAX_EXAMPLES (RUN_EXAMPLES for run directories) examples; trees are at most a few levels deep and a few dozen leaves wide,
plus one deliberately deep nesting case per JSON parser.
"""
import json
import sqlite3
import string

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from speedbench.errors import UserError

MAX_EXAMPLES = 60        # per test of a file parser (milliseconds each)
RUN_EXAMPLES = 25        # per test of the run-directory files (each builds a points table: ~0.1 s)
FUZZ = settings(max_examples=MAX_EXAMPLES, derandomize=True, database=None, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.function_scoped_fixture])
RUN_FUZZ = settings(FUZZ, max_examples=RUN_EXAMPLES)


def allowed(call, *args, **kwargs):
    """Run a parser: a result or a one-line UserError are fine; anything else propagates."""
    try:
        return call(*args, **kwargs)
    except UserError as exc:
        assert "\n" not in str(exc)
        return exc


# ----------------------------------------------------------------- strategies
# Numbers where parsers break: huge integers, floats at the edges, non-finite values.
numbers = st.one_of(
    st.integers(), st.integers(min_value=-(2**70), max_value=2**70), st.just(10**400),
    st.floats(allow_nan=True, allow_infinity=True), st.sampled_from([0, -1, 1e308, -1e308, 5e-324, 2**63]),
)
scalars = st.one_of(st.none(), st.booleans(), numbers, st.text(max_size=20))


def trees(keys=st.text(max_size=8), leaves=scalars):
    return st.recursive(leaves, lambda kids: st.one_of(st.lists(kids, max_size=5),
                                                       st.dictionaries(keys, kids, max_size=5)),
                        max_leaves=30)


def json_text(value) -> str:
    # Python's json writes NaN / Infinity and huge integers: the files a careless tool may write.
    return json.dumps(value)


def mutate(doc, path_choice, new_value):
    """A copy of the JSON-like `doc` with one leaf (picked by path_choice) replaced by new_value."""
    import copy

    doc = copy.deepcopy(doc)
    spots = []

    def walk(node):
        items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else ()
        for k, v in items:
            spots.append((node, k))
            walk(v)

    walk(doc)
    if spots:
        node, key = spots[path_choice % len(spots)]
        node[key] = new_value
    return doc


def deep(n: int) -> str:
    return "[" * n + "]" * n


# ----------------------------------------------------------------- profiles (TOML)
VALID_PROFILE = {
    "run": {"name": "p", "host": "h", "output": "runs/{name}", "timeout_s": 30},
    "dataset": {"scenes": {"count": 2, "seed": 0}, "accuracy": False, "timing_images": 1, "max_pixels": 1000000},
    "sweep": {"sizes": [64, "native"], "proposals": ["default", 10], "backends": ["synthetic"]},
    "models": [{"id": "synthetic", "weights": "none"}],
    "threads": [{"intra": 1, "inter": 1, "mode": "sequential"}],
    "repetitions": {"min_reps": 3, "max_reps": 5, "max_seconds": 0.5, "rel_ci": 0.1},
    "synthetic": {"work_ms": 1.0},
}


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v) if abs(v) < 10**50 else "9" * 5000  # a literal beyond Python's digit limit
    if isinstance(v, float):
        return {float("inf"): "inf", float("-inf"): "-inf"}.get(v, "nan" if v != v else repr(v))
    if isinstance(v, str):
        return json.dumps(v)  # TOML basic strings take JSON's escapes (surrogates are refused: fine)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{json.dumps(str(k))} = {toml_value(x)}" for k, x in v.items()) + "}"
    return '""'  # None has no TOML form


def toml_text(doc: dict) -> str:
    lines = []
    for key, value in doc.items():
        if isinstance(value, dict):
            lines.append(f"[{json.dumps(str(key))}]")
            lines += [f"{json.dumps(str(k))} = {toml_value(v)}" for k, v in value.items()]
        elif isinstance(value, list) and value and all(isinstance(x, dict) for x in value):
            for item in value:
                lines.append(f"[[{json.dumps(str(key))}]]")
                lines += [f"{json.dumps(str(k))} = {toml_value(v)}" for k, v in item.items()]
        else:
            lines.insert(0, f"{json.dumps(str(key))} = {toml_value(value)}")
    return "\n".join(lines) + "\n"


profile_keys = st.sampled_from(["run", "dataset", "sweep", "models", "threads", "repetitions", "synthetic",
                                "name", "host", "output", "scenes", "count", "sizes", "proposals", "intra",
                                "id", "weights", "max_pixels", "path", "x"])


@FUZZ
@given(st.binary(max_size=400))
def test_profile_arbitrary_bytes(data):
    from speedbench.sweep.profile import parse_profile

    allowed(parse_profile, data.decode("utf-8", "replace"), "fuzz.toml")


@FUZZ
@given(st.dictionaries(profile_keys, trees(keys=profile_keys), max_size=7))
def test_profile_arbitrary_toml_trees(doc):
    from speedbench.sweep.profile import parse_profile

    allowed(parse_profile, toml_text(doc), "fuzz.toml")


@FUZZ
@given(st.integers(min_value=0, max_value=10_000), trees())
def test_profile_valid_with_one_leaf_replaced(where, value):
    from speedbench.sweep.profile import Profile, parse_profile

    got = allowed(parse_profile, toml_text(mutate(VALID_PROFILE, where, value)), "fuzz.toml")
    if isinstance(got, Profile):
        got.output_dir()   # whatever passed must be usable
    assert isinstance(parse_profile(toml_text(VALID_PROFILE), "ok.toml"), Profile)


def test_profile_deep_nesting_is_refused():
    from speedbench.sweep.profile import parse_profile

    with pytest.raises(UserError, match="fuzz.toml"):
        parse_profile("[run]\nname = " + deep(5000) + "\n", "fuzz.toml")


# ----------------------------------------------------------------- COCO annotations
VALID_COCO = {
    "images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}],
    "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [1, 2, 10, 20], "area": 200, "iscrowd": 0}],
    "categories": [{"id": 1, "name": "crate"}],
}


@pytest.fixture(scope="module")
def scratch(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


def load_coco(scratch, data: bytes):
    from speedbench.data import load_dataset

    path = scratch / "annotations.json"
    path.write_bytes(data)
    return allowed(load_dataset, path, check_images=False)


@FUZZ
@given(st.binary(max_size=400))
def test_annotations_arbitrary_bytes(scratch, data):
    load_coco(scratch, data)


@FUZZ
@given(trees(keys=st.sampled_from(["images", "annotations", "categories", "id", "image_id", "category_id",
                                   "bbox", "width", "height", "file_name", "name", "area", "iscrowd"])))
def test_annotations_arbitrary_json_trees(scratch, doc):
    load_coco(scratch, json_text(doc).encode())


@FUZZ
@given(st.integers(min_value=0, max_value=10_000), trees())
def test_annotations_valid_with_one_leaf_replaced(scratch, where, value):
    load_coco(scratch, json_text(mutate(VALID_COCO, where, value)).encode())


def test_annotations_deep_nesting_is_refused(scratch):
    got = load_coco(scratch, ('{"images": ' + deep(100_000) + "}").encode())
    assert isinstance(got, UserError) and "nested deeper" in str(got)


# ----------------------------------------------------------------- Pascal VOC XML
VOC_TAGS = ["annotation", "filename", "size", "width", "height", "depth", "object", "name", "bndbox",
            "xmin", "ymin", "xmax", "ymax", "difficult", "x"]


def xml_trees():
    text = st.one_of(st.text(alphabet=string.printable, max_size=12),
                     st.sampled_from(["inf", "nan", "-1", "1e400", "10", "0", "99999999999999999999", "3.5"]))
    leaf = st.builds(lambda tag, t: (tag, t, []), st.sampled_from(VOC_TAGS), text)
    return st.recursive(leaf, lambda kids: st.builds(lambda tag, t, c: (tag, t, c), st.sampled_from(VOC_TAGS),
                                                      text, st.lists(kids, max_size=4)), max_leaves=25)


def xml_text(node) -> str:
    from xml.sax.saxutils import escape

    tag, text, children = node
    return f"<{tag}>{escape(text)}{''.join(xml_text(c) for c in children)}</{tag}>"


def load_voc(scratch, data: bytes):
    from speedbench.data import load_dataset

    root = scratch / "voc"
    (root / "Annotations").mkdir(parents=True, exist_ok=True)
    (root / "JPEGImages").mkdir(exist_ok=True)
    (root / "Annotations" / "a.xml").write_bytes(data)
    return allowed(load_dataset, root, check_images=False)


@FUZZ
@given(st.binary(max_size=400))
def test_voc_arbitrary_bytes(scratch, data):
    load_voc(scratch, data)


@FUZZ
@given(xml_trees())
def test_voc_arbitrary_xml_trees(scratch, tree):
    load_voc(scratch, xml_text(("annotation", "", [tree])).encode())


@FUZZ
@given(st.sampled_from(["width", "height", "xmin", "ymin", "xmax", "ymax"]),
       st.one_of(st.sampled_from(["inf", "-inf", "nan", "1e400", "-0", "", "1e9", "12.5"]), st.text(max_size=8)))
def test_voc_valid_with_one_number_replaced(scratch, field, value):
    from xml.sax.saxutils import escape

    values = {"width": "64", "height": "48", "xmin": "2", "ymin": "3", "xmax": "20", "ymax": "30", field: value}
    doc = (f"<annotation><filename>a.png</filename><size><width>{escape(values['width'])}</width>"
           f"<height>{escape(values['height'])}</height></size><object><name>crate</name><bndbox>"
           + "".join(f"<{k}>{escape(values[k])}</{k}>" for k in ("xmin", "ymin", "xmax", "ymax"))
           + "</bndbox></object></annotation>")
    load_voc(scratch, doc.encode())


# ----------------------------------------------------------------- detections
VALID_DETS = [{"image_id": 1, "category_id": 1, "bbox": [1.0, 2.0, 10.0, 20.0], "score": 0.9}]


def load_dets(scratch, data: bytes):
    from speedbench.evaluate import load_detections

    path = scratch / "dets.json"
    path.write_bytes(data)
    return allowed(load_detections, path, VALID_COCO)


@FUZZ
@given(st.binary(max_size=400))
def test_detections_arbitrary_bytes(scratch, data):
    load_dets(scratch, data)


@FUZZ
@given(trees(keys=st.sampled_from(["image_id", "category_id", "bbox", "score", "x"])))
def test_detections_arbitrary_json_trees(scratch, doc):
    load_dets(scratch, json_text(doc).encode())


@FUZZ
@given(st.integers(min_value=0, max_value=10_000), trees())
def test_detections_valid_with_one_leaf_replaced(scratch, where, value):
    load_dets(scratch, json_text(mutate(VALID_DETS, where, value)).encode())


@FUZZ
@given(st.integers(min_value=0, max_value=10_000), trees())
def test_detections_in_memory_with_one_leaf_replaced(where, value):
    # parse_detections is also called on lists built in Python (no JSON on the way).
    from speedbench.evaluate.cocoeval import GroundTruth
    from speedbench.evaluate.results import parse_detections

    allowed(parse_detections, mutate(VALID_DETS, where, value), GroundTruth(VALID_COCO))


def test_detections_deep_nesting_is_refused(scratch):
    got = load_dets(scratch, deep(200_000).encode())
    assert isinstance(got, UserError) and "dets.json" in str(got)


# ----------------------------------------------------------------- run directory files
def make_run(root):
    from speedbench.sweep import RunDir

    row = {"model": "synthetic", "weights": "none", "size": 64, "proposals": 0, "backend": "synthetic",
           "intra_threads": 1, "inter_threads": 1, "exec_mode": "", "opt_level": "", "affinity": 0,
           "concurrency": 1, "status": "ok", "lat_p50_ms": 1.0, "n_samples": 3, "point_id": "p1"}
    with RunDir.create(root, "[run]\nname = 'x'\n", {"env": {}}) as rd:
        rd.write_point(row, [1.0, 1.1, 0.9])
    return root


@pytest.fixture(scope="module")
def run_template(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("runfuzz") / "run")


def fresh_run(scratch, template):
    import shutil

    target = scratch / "run"
    shutil.rmtree(target, ignore_errors=True)
    shutil.copytree(template, target)
    return target


def read_run(path):
    from speedbench.analyse import Run

    return allowed(Run.load, path)


@RUN_FUZZ
@given(st.one_of(st.binary(max_size=300), st.builds(lambda t: json_text(t).encode(), trees())))
def test_run_meta_arbitrary(scratch, run_template, data):
    run = fresh_run(scratch, run_template)
    (run / "meta.json").write_bytes(data)
    read_run(run)


@RUN_FUZZ
@given(st.one_of(st.text(max_size=200), st.builds(json_text, trees()), st.binary(max_size=50),
                 st.integers(), st.none(), st.floats()))
def test_run_row_arbitrary(scratch, run_template, blob):
    run = fresh_run(scratch, run_template)
    con = sqlite3.connect(run / "points.sqlite")
    try:
        con.execute("PRAGMA ignore_check_constraints = ON")
        con.execute("UPDATE points SET row = ?", (blob,))
        con.commit()
    except (sqlite3.IntegrityError, OverflowError):
        return  # SQLite itself refuses NULL (NOT NULL) and integers beyond 64 bits
    finally:
        con.close()
    got = read_run(run)
    if isinstance(got, UserError):
        assert "damaged run directory" in str(got) and "row 1" in str(got)


@RUN_FUZZ
@given(st.integers(min_value=0, max_value=10_000), trees())
def test_run_row_valid_with_one_leaf_replaced(scratch, run_template, where, value):
    run = fresh_run(scratch, run_template)
    con = sqlite3.connect(run / "points.sqlite")
    row = json.loads(con.execute("SELECT row FROM points").fetchone()[0])
    con.execute("UPDATE points SET row = ?", (json_text(mutate(row, where, value)),))
    con.commit()
    con.close()
    read_run(run)


@RUN_FUZZ
@given(st.one_of(scalars, st.binary(max_size=20)))
def test_run_samples_arbitrary(scratch, run_template, value):
    run = fresh_run(scratch, run_template)
    con = sqlite3.connect(run / "points.sqlite")
    try:
        con.execute("UPDATE samples SET ms = ? WHERE i = 1", (value,))
        con.commit()
    except (sqlite3.IntegrityError, OverflowError):
        return  # SQLite itself refuses NULL / integers beyond 64 bits
    finally:
        con.close()
    read_run(run)


def test_run_meta_deep_nesting_is_refused(scratch, run_template):
    run = fresh_run(scratch, run_template)
    (run / "meta.json").write_text('{"env": ' + deep(100_000) + "}")
    got = read_run(run)
    assert isinstance(got, UserError) and "meta.json" in str(got)
