"""The demo profile's plan, in dry run: what `speedbench demo` will measure, without measuring."""
from pathlib import Path

from speedbench.cli import main
from speedbench.demo.run import demo_profile_path
from speedbench.sweep import expand_plan, load_profile

DEMO_MODELS = {"demo_ssdlite", "demo_fcos", "demo_frcnn", "demo_frcnn_lite"}


def test_demo_plan_covers_the_compact_zoo():
    profile = load_profile(demo_profile_path())
    plan = expand_plan(profile, concurrency_supported=True, cores=2)
    by_model = {}
    for p in plan.points:
        by_model.setdefault(p.config["model"], []).append(p)
    assert set(by_model) == DEMO_MODELS
    # 2 sizes x 2 thread settings; the two-stage models also x 2 proposal counts, the
    # one-stage models keep their own default candidate count (per-model axis)
    from speedbench.zoo import get_spec

    for m in ("demo_ssdlite", "demo_fcos"):
        assert len(by_model[m]) == 2 * 2
        assert {p.config["proposals"] for p in by_model[m]} == {get_spec(m).default_proposals}
        assert by_model[m][0].family == "one-stage"
    for m in ("demo_frcnn", "demo_frcnn_lite"):
        assert len(by_model[m]) == 2 * 2 * 2 and {p.config["proposals"] for p in by_model[m]} == {50, 300}
        assert by_model[m][0].family == "two-stage"
    assert len(plan.points) == 24 and len(plan.graphs) == 12
    assert all(p.config["weights"] == "demo" for p in plan.points)   # trained: accuracy is measured
    assert profile.accuracy and profile.scenes_count > 0 and profile.dataset_path is None  # offline data
    assert {p.config["intra_threads"] for p in plan.points} == {1, 2}
    assert all(p.config["backend"] == "ort" and p.config["concurrency"] == 1 for p in plan.points)


def test_demo_dry_run_prints_plan_and_estimate(tmp_path, capsys):
    assert main(["demo", "--dry-run", "-o", str(tmp_path / "demo")]) == 0
    out = capsys.readouterr().out
    assert "24 point(s) over 12 distinct graph(s)" in out
    assert out.count("demo_frcnn_lite/demo/") == 8
    assert "estimate" in out
    assert not (tmp_path / "demo").exists()   # a dry run writes nothing


def test_demo_budget_must_be_positive(capsys):
    assert main(["demo", "--budget-ms", "-5"]) == 2
    assert "--budget-ms" in capsys.readouterr().err


def test_sweep_dry_run_of_shipped_profiles(capsys):
    root = Path(__file__).resolve().parents[1] / "profiles"
    for name in ("cpu-budget", "upgrade-check", "full-study"):
        assert main(["sweep", str(root / f"{name}.toml"), "--dry-run"]) == 0
        out = capsys.readouterr().out
        assert f"profile {name!r}" in out and "estimate" in out


def test_demo_profile_ships_as_package_data_without_a_second_copy():
    from importlib import resources

    shipped = Path(str(resources.files("speedbench.demo") / "demo.toml"))
    checkout = Path(__file__).resolve().parents[1] / "profiles" / "demo.toml"
    assert shipped.is_symlink() and shipped.resolve() == checkout.resolve()
    assert demo_profile_path() == checkout.resolve()


def test_family_table_keeps_the_fastest_point_of_each_family_per_size_and_threads():
    # Worked by hand: at 320 px / 1 thread the one-stage minimum is 10 ms (b), the two-stage
    # minimum 25 ms (c at 50 proposals), so two-stage is 2.5x the fastest; the failed point
    # and the other size/thread groups do not mix in.
    import pandas as pd

    from speedbench.demo.run import family_table

    rows = [("a", "one-stage", 320, 1, 300, 12.0, 0.40, "ok"), ("b", "one-stage", 320, 1, 300, 10.0, 0.30, "ok"),
            ("c", "two-stage", 320, 1, 50, 25.0, 0.35, "ok"), ("c", "two-stage", 320, 1, 300, 40.0, 0.45, "ok"),
            ("d", "two-stage", 320, 1, 300, 5.0, None, "failed"),
            ("c", "two-stage", 256, 1, 50, 15.0, 0.30, "ok"), ("c", "two-stage", 320, 2, 50, 14.0, 0.35, "ok")]
    df = pd.DataFrame(rows, columns=["model", "family", "size", "intra_threads", "proposals", "lat_p50_ms",
                                     "map", "status"])
    df.loc[df["status"] == "failed", "lat_p50_ms"] = None
    t = family_table(df)
    assert list(zip(t["size"], t["intra_threads"], t["family"], t["model"], t["proposals"])) == [
        (256, 1, "two-stage", "c", 50), (320, 1, "one-stage", "b", 300), (320, 1, "two-stage", "c", 50),
        (320, 2, "two-stage", "c", 50)]
    assert t["vs_fastest"].tolist() == [1.0, 1.0, 2.5, 1.0]
    assert len(family_table(df[df["status"] == "failed"])) == 0
