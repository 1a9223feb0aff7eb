"""Arguments: run names, output paths and templates, the range of every numeric option and the
suffix of every output file are checked before any work starts: one line, exit status 2."""
import json

import pytest

from speedbench.errors import UserError
from helpers import cli, write_profile


def refused(capsys, args, *words):
    """speedbench args exits 2 with one line on stderr holding every word."""
    code = cli(args)
    err = capsys.readouterr().err.strip()
    assert code == 2, (args, err)
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    for w in words:
        assert w in err, (w, err)
    return err


# ----------------------------------------------------------------- run names and output paths
@pytest.mark.parametrize("name, why", [
    ("x" * 300, "not a run name"), ("..", "not a run name"), (".", "not a run name"),
    ("a/b", "not a run name"), (".hidden", "not a run name"), ("", "must not be empty"),
])
def test_run_name_must_be_one_safe_path_component(tmp_path, monkeypatch, capsys, name, why):
    monkeypatch.chdir(tmp_path)
    prof = write_profile(tmp_path, sizes="[64]")
    prof.write_text(prof.read_text().replace('name = "syn"', f'name = "{name}"'))
    refused(capsys, ["sweep", str(prof)], "run.name", why)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["syn.toml"]     # nothing was created


def test_output_template_allows_only_the_documented_fields(tmp_path, capsys):
    from speedbench.sweep.profile import parse_profile

    prof = write_profile(tmp_path, sizes="[64]")
    for template in ("{name.__class__.__mro__}", "{name!r}", "{host:>400}", "{0}", "{", "runs/{user}"):
        text = prof.read_text().replace('timeout_s = 30', f'timeout_s = 30\noutput = "{template}"')
        with pytest.raises(UserError, match=r"run\.output: .*only the fields \{name\} and \{host\}"):
            parse_profile(text, "p.toml")
    ok = prof.read_text().replace('timeout_s = 30', 'timeout_s = 30\noutput = "runs/{host}/{name}"')
    assert str(parse_profile(ok, "p.toml").output_dir()).endswith("/syn")


def test_output_directory_with_an_overlong_component_is_refused_before_anything(tmp_path, capsys):
    prof = write_profile(tmp_path, sizes="[64]")
    refused(capsys, ["sweep", str(prof), "-o", str(tmp_path / ("r" * 300))], "-o/--output", "longer than 255 bytes")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["syn.toml"]


def test_resume_after_profile_copy_deleted_says_it_is_missing(tmp_path, capsys):
    prof = write_profile(tmp_path, sizes="[64]")
    run = tmp_path / "run"
    assert cli(["sweep", str(prof), "-o", str(run), "-q"]) == 0
    capsys.readouterr()
    (run / "profile.toml").unlink()
    err = refused(capsys, ["sweep", str(prof), "-o", str(run), "--resume"], "profile.toml: missing")
    assert "different profile" not in err


# ----------------------------------------------------------------- numeric ranges
# Each is refused by argparse, before any run directory is read: RUN does not even exist.
@pytest.mark.parametrize("args, option", [
    (["pick", "RUN", "--budget-ms", "40", "--min-map", "2"], "--min-map"),
    (["pick", "RUN", "--budget-ms", "40", "--threads", "-1"], "--threads"),
    (["pick", "RUN", "--budget-ms", "40", "--max-memory-mb", "-1"], "--max-memory-mb"),
    (["pick", "RUN", "--budget-ms", "nan"], "--budget-ms"),
    (["pick", "RUN", "--budget-ms", "0"], "--budget-ms"),
    (["size", "RUN", "--streams", "4", "--fps", "1e-300"], "fps (--fps)"),
    (["size", "RUN", "--streams", "4", "--fps", "1e308"], "fps (--fps)"),
    (["size", "RUN", "--streams", "0", "--fps", "5"], "streams (--streams)"),
    (["size", "RUN", "--streams", "4", "--fps", "5", "--headroom", "1.5"], "headroom (--headroom)"),
    (["size", "RUN", "--streams", "4", "--fps", "5", "--server-cores", "8,-2"], "server_cores (--server-cores)"),
    (["size", "RUN", "--streams", "4", "--fps", "5", "--p99-ms", "inf"], "p99_ms (--p99-ms)"),
    (["size", "RUN", "--streams", "4", "--fps", "5", "--core-hour-cost", "-1"], "core_hour_cost (--core-hour-cost)"),
    (["report", "RUN", "--budget-ms", "-5"], "--budget-ms"),
    (["compare", "A", "B", "--threshold", "-5%"], "--threshold"),
    (["compare", "A", "B", "--confidence", "1.5"], "--confidence"),
    (["measure", "g.onnx", "--size", "100000"], "--size"),
    (["measure", "g.onnx", "--threads", "-1"], "--threads"),
    (["measure", "g.onnx", "--max-seconds", "0"], "--max-seconds"),
    (["measure", "g.onnx", "--rel-ci", "1"], "--rel-ci"),
    (["measure", "g.onnx", "--timeout", "-1"], "--timeout"),
    (["evaluate", "GT", "D", "--bootstrap", "-1"], "--bootstrap"),
    (["evaluate", "GT", "D", "--threads", "1000"], "--threads"),
    (["export", "m", "--size", "5"], "--size"),
    (["export", "m", "--proposals", "0"], "--proposals"),
    (["scenes", "OUT", "--count", "0"], "--count"),
    (["scenes", "OUT", "--width", "100000"], "--width"),
    (["train", "--steps", "0"], "--steps"),
    (["demo", "--budget-ms", "-1"], "--budget-ms"),
    (["load", "p.toml", "--seconds", "inf"], "--seconds"),
    (["load", "p.toml", "--seconds", "0"], "--seconds"),
])
def test_numeric_options_have_ranges_checked_first(capsys, args, option):
    # `size` checks its figures with the sizing API's own check, still before any run is read
    refused(capsys, args, option if "(" in option else f"argument {option}")


@pytest.mark.parametrize("args, option, suffix", [
    (["frontier", "RUN", "-o", "f.jpgx"], "-o/--output", ".png or .svg"),
    (["report", "RUN", "-o", "r.pdf"], "-o/--output", ".html"),
    (["measure", "g.onnx", "-o", "result.txt"], "-o/--out", ".json"),
    (["evaluate", "GT", "--graph", "g.onnx", "--save-dets", "d.csv"], "--save-dets", ".json"),
    (["export", "m", "-o", "m.pt"], "-o/--out", ".onnx"),
])
def test_output_files_have_allowed_suffixes_checked_first(tmp_path, monkeypatch, capsys, args, option, suffix):
    monkeypatch.chdir(tmp_path)
    refused(capsys, args, f"argument {option}", suffix)


def test_sizing_api_has_the_same_ranges():
    import pandas as pd

    from speedbench.analyse.sizing import size

    for kw, what in ((dict(fps=1e-300), "fps"), (dict(fps=1e308), "fps"), (dict(streams=10**9), "streams")):
        args = {"streams": 4, "fps": 5.0, **kw}
        with pytest.raises(UserError, match=rf"{what} \(--{what}\): must be"):
            size(pd.DataFrame(), args["streams"], args["fps"])


# ----------------------------------------------------------------- measure: size vs graph, corrupt graph
def tiny_onnx(path):
    """A valid one-node ONNX graph (Identity), enough for the checks made before measuring."""
    import onnx
    from onnx import TensorProto, helper

    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, [3, None, None])
    y = helper.make_tensor_value_info("boxes", TensorProto.FLOAT, [3, None, None])
    graph = helper.make_graph([helper.make_node("Identity", ["image"], ["boxes"])], "g", [x], [y])
    onnx.save(helper.make_model(graph), path)
    return path


def test_measure_refuses_a_size_the_graph_was_not_exported_for(tmp_path, capsys):
    import json

    # The export cache's name carries the size; so does the export record beside the graph.
    cached = tiny_onnx(tmp_path / "demo_ssdlite-s320-p300-o17-0123456789abcdef.onnx")
    refused(capsys, ["measure", str(cached), "--model", "demo_ssdlite", "--size", "256"],
            "--size 256", "exported for 320 px")
    copied = tiny_onnx(tmp_path / "mine.onnx")
    (tmp_path / "mine.json").write_text(json.dumps({"size": 288, "model_id": "demo_ssdlite"}))
    refused(capsys, ["measure", str(copied), "--model", "demo_ssdlite", "--size", "320"],
            "--size 320", "mine.onnx was exported for 288 px")
    from speedbench.cli.measure import graph_size

    assert graph_size(str(cached)) == 320 and graph_size(str(copied)) == 288
    assert graph_size(str(tiny_onnx(tmp_path / "plain.onnx"))) is None


def test_measure_of_a_corrupt_graph_is_bad_input_exit_2(tmp_path, capsys):
    bad = tmp_path / "broken.onnx"
    bad.write_bytes(b"\x08\x07garbage" * 50)
    refused(capsys, ["measure", str(bad), "--model", "demo_ssdlite"], "broken.onnx: not a readable ONNX graph")
    refused(capsys, ["measure", str(tmp_path / "missing.onnx"), "--model", "demo_ssdlite"],
            "missing.onnx: ONNX graph file not found")


def test_load_worker_counts_have_a_range(capsys):
    refused(capsys, ["load", "p.toml", "-k", "1,999"], "-k/--concurrency: K must be >= 1 and <= 256")
    refused(capsys, ["load", "p.toml", "--utilisation", "nan"], "--utilisation: each must be in (0, 1.5]")


def test_a_reader_that_goes_away_is_not_a_traceback(tmp_path):
    # `speedbench evaluate ... | head`: the pipe closes before the result is written. Python's
    # own guidance (signal module documentation, "Note on SIGPIPE") is a quiet exit, not a traceback.
    import subprocess
    import sys

    gt = {"images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}],
          "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [1, 2, 10, 10]}],
          "categories": [{"id": 1, "name": "crate"}]}
    (tmp_path / "gt.json").write_text(json.dumps(gt))
    (tmp_path / "dets.json").write_text(json.dumps(
        [{"image_id": 1, "category_id": 1, "bbox": [1, 2, 10, 10], "score": 0.9}]))
    proc = subprocess.Popen([sys.executable, "-m", "speedbench", "evaluate", str(tmp_path / "gt.json"),
                             str(tmp_path / "dets.json"), "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()  # the reader is gone before anything is written
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 1
    assert "Traceback" not in err, err
