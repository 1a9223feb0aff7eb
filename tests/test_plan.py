"""Plan expansion: counts of the cross product, mapping of knobs that do not apply, skips, ids."""
import pytest

from speedbench import schema
from speedbench.errors import UserError
from speedbench.sweep.plan import estimate_seconds, expand_plan
from speedbench.sweep.profile import parse_profile
from speedbench.zoo.spec import ModelSpec

SPECS = {
    "one": ModelSpec(id="one", builder="x.y", family="one-stage", native_size=320,
                     detections_per_img=100, score_thresh=0.05, default_proposals=0, arch="RetinaNet"),
    "two": ModelSpec(id="two", builder="x.y", family="two-stage", native_size=512,
                     detections_per_img=100, score_thresh=0.05, default_proposals=1000, arch="FasterRCNN"),
}


def get_spec(model_id):
    if model_id not in SPECS:
        raise UserError(f"unknown model {model_id!r}")
    return SPECS[model_id]


def profile(body: str):
    return parse_profile('[run]\nname = "p"\n[dataset]\nscenes = {count = 5}\n' + body, "p.toml")


def plan_of(body, **kw):
    kw.setdefault("concurrency_supported", True)
    kw.setdefault("cores", 4)
    return expand_plan(profile(body), get_spec=get_spec, **kw)


THREADS_3 = "[[threads]]\nintra = 1\n[[threads]]\nintra = 2\n[[threads]]\nintra = 4\n"


def test_full_cross_product_count():
    # 3 sizes x 2 proposals x 2 backends x 3 thread settings
    p = plan_of('[sweep]\nsizes = [256, 320, 512]\nproposals = [100, 300]\nbackends = ["ort", "eager"]\n'
                '[[models]]\nid = "two"\n' + THREADS_3)
    assert len(p.points) == 3 * 2 * 2 * 3
    assert len(p.graphs) == 3 * 2          # backends and threads share one export per graph
    assert len({pt.point_id for pt in p.points}) == len(p.points)


def test_model_without_proposal_knob_is_mapped_to_zero_with_note():
    p = plan_of('[sweep]\nsizes = [256, 320]\nproposals = [100, 300, 1000]\n'
                '[[models]]\nid = "one"\n[[models]]\nid = "two"\n' + THREADS_3)
    one = [pt for pt in p.points if pt.config["model"] == "one"]
    two = [pt for pt in p.points if pt.config["model"] == "two"]
    assert len(one) == 2 * 1 * 3 and {pt.config["proposals"] for pt in one} == {0}
    assert len(two) == 2 * 3 * 3
    assert any("one: has no proposal knob" in n for n in p.notes)
    assert all("proposals mapped to 0" in pt.notes[0] for pt in one)


def test_native_and_default_resolve_and_dedupe():
    p = plan_of('[sweep]\nsizes = ["native", 512]\nproposals = ["default", 1000]\n'
                '[[models]]\nid = "two"\n[[threads]]\nintra = 1\n')
    # native = 512 and default = 1000 for "two": one point, not four.
    assert [(pt.config["size"], pt.config["proposals"]) for pt in p.points] == [(512, 1000)]


def test_per_model_axes_override_global():
    p = plan_of('[sweep]\nsizes = [256, 320]\n[[models]]\nid = "one"\nsizes = [640]\n'
                '[[models]]\nid = "two"\nproposals = [50]\n[[threads]]\nintra = 1\n')
    assert sorted((pt.config["model"], pt.config["size"], pt.config["proposals"]) for pt in p.points) == [
        ("one", 640, 0), ("two", 256, 50), ("two", 320, 50)]


def test_sequential_inter_threads_map_and_merge():
    p = plan_of('[[models]]\nid = "one"\n[[threads]]\nintra = 2\ninter = 1\n'
                '[[threads]]\nintra = 2\ninter = 2\n[[threads]]\nintra = 2\ninter = 2\nmode = "parallel"\n')
    assert len(p.points) == 2   # inter=2 sequential is the same measurement as inter=1 sequential
    assert any("no effect in sequential mode" in n for n in p.notes)
    assert any("mapped onto points already planned" in n for n in p.notes)


def test_eager_ignores_opt_levels():
    p = plan_of('[sweep]\nbackends = ["ort", "eager"]\nopt_levels = ["basic", "all"]\n'
                '[[models]]\nid = "one"\n[[threads]]\nintra = 1\n')
    eager = [pt for pt in p.points if pt.config["backend"] == "eager"]
    assert len(eager) == 1 and eager[0].config["opt_level"] == "" and eager[0].config["exec_mode"] == ""
    assert len(p.points) == 3


def test_skips_pins_beyond_cores_and_unsupported_concurrency():
    body = ('[sweep]\nconcurrency = [1, 2, 4]\n[[models]]\nid = "one"\n'
            '[[threads]]\nintra = 1\naffinity = 1\n[[threads]]\nintra = 1\naffinity = 8\n')
    p = plan_of(body, cores=2, concurrency_supported=False)
    assert len(p.points) == 1
    assert any("skipped affinity=8" in n for n in p.notes)
    assert any("skipped concurrency=2" in n for n in p.notes)
    p = plan_of(body, cores=2, concurrency_supported=True)
    # K=4 workers x 1 thread do not fit 2 cores: skipped; K=2 fits.
    assert len(p.points) == 2 and {pt.config["concurrency"] for pt in p.points} == {1, 2}
    assert any("skipped concurrency=4 x 1 threads" in n for n in p.notes)


def test_synthetic_model_only_on_synthetic_backend():
    p = plan_of('[sweep]\nbackends = ["ort", "synthetic"]\nproposals = [50, 100]\n'
                '[[models]]\nid = "synthetic:work_ms=1"\n[[threads]]\nintra = 1\n')
    assert {pt.config["backend"] for pt in p.points} == {"synthetic"}
    assert {pt.config["proposals"] for pt in p.points} == {50, 100}
    assert any("synthetic backend only" in n for n in p.notes)


def test_unknown_model_names_key_path():
    with pytest.raises(UserError, match=r"p.toml: models\[1\].id: unknown model 'nope'"):
        plan_of('[[models]]\nid = "one"\n[[models]]\nid = "nope"\n[[threads]]\nintra = 1\n')


def test_point_ids_match_schema_and_are_stable():
    # Literal ids, computed by the code of 0.1.0 before the point pipeline was refactored: resume
    # and compare match rows of runs made by older versions on these, so they must never change.
    body = '[sweep]\nsizes = [256, 320]\n[[models]]\nid = "one"\n[[threads]]\nintra = 1\n'
    assert [pt.point_id for pt in plan_of(body).points] == ["04d5f0bf5eec", "b80ead739f33"]
    body = ('[sweep]\nsizes = [320]\nproposals = [100]\nbackends = ["ort", "eager"]\nconcurrency = [1, 2]\n'
            '[[models]]\nid = "two"\n[[threads]]\nintra = 2\ninter = 1\nmode = "parallel"\n')
    points = plan_of(body).points
    # ORT, then eager (ORT-only knobs blanked before the id is taken), each at K = 1 and K = 2
    assert [pt.point_id for pt in points] == ["3e317b12e98c", "d9f98e50fc14", "4a306bfe1ab5", "0c9b09d3a679"]
    assert [(pt.config["exec_mode"], pt.config["opt_level"]) for pt in points] == \
        [("parallel", "all")] * 2 + [("", "")] * 2
    for pt in points:
        assert pt.point_id == schema.point_id(pt.config)
        assert set(pt.config) == set(schema.CONFIG_COLUMNS)


def test_estimate_counts_only_missing_points():
    body = '[sweep]\nsizes = [256, 320]\n[repetitions]\nmax_seconds = 2.0\n[[models]]\nid = "one"\n' \
           'weights = "demo"\n' + THREADS_3
    prof = profile(body)
    plan = expand_plan(prof, get_spec=get_spec, concurrency_supported=True, cores=4)
    full = estimate_seconds(plan, prof)
    assert full["points"] == 6 and full["graphs"] == 2 and full["evaluations"] == 2
    done = {plan.points[0].point_id, plan.points[1].point_id, plan.points[2].point_id}
    part = estimate_seconds(plan, prof, done)
    assert part["points"] == 3 and part["measure_s"] == pytest.approx(full["measure_s"] / 2)
    assert part["total_s"] < full["total_s"]


def test_sizes_below_a_models_minimum_are_skipped_with_note():
    import dataclasses

    specs = {**SPECS, "small": dataclasses.replace(SPECS["one"], id="small", min_size=256)}
    p = expand_plan(profile('[sweep]\nsizes = [128, 320]\n[[models]]\nid = "small"\n[[threads]]\nintra = 1\n'),
                    get_spec=specs.__getitem__, concurrency_supported=True, cores=4)
    assert [pt.config["size"] for pt in p.points] == [320]
    assert any("skipped small at size 128: below its minimum input size 256 px" in n for n in p.notes)
