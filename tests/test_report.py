"""Review report: self-contained, escaped, complete; rendered by headless Chromium when present."""
import base64
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest

from speedbench.cli import main
from speedbench.report import render_html, render_markdown
from speedbench.schema import point_id

EVIL = "<script>alert(1)</script>det"


def _write_run(path, untrained=False, evil=EVIL, host="box", latency=True):
    from speedbench.sweep import RunDir

    rng = np.random.default_rng(0)
    env = {"cpu_model": "Test CPU <b>", "cores_logical": 2, "packages": {"torch": "2.14.1"},
           "thread_env": {"OMP_NUM_THREADS": "1"}}
    from speedbench.measure.backends.ort import TIMED_REGION

    # what a sweep records in meta.json (sweep.pipeline.run_facts), here written by hand
    rd = RunDir.create(path, "[run]\nname = 'unit'\n", {"profile_name": "unit", "host": host, "env": env,
                                                       "timed_regions": {"ort": TIMED_REGION}})
    for model, fam, props in ((evil, "one-stage", 0), ("twostage", "two-stage", 100)):
        for size in (256, 320):
            for t in (1, 2):
                cfg = dict(model=model, weights="demo", size=size, proposals=props, backend="ort", intra_threads=t,
                           inter_threads=1, exec_mode="sequential", opt_level="all", affinity=0, concurrency=1)
                base = (5 if fam == "one-stage" else 15) * (size / 256) ** 2 / t ** 0.7
                s = base * (1 + rng.lognormal(-3, 0.5, 60))
                m = np.nan if untrained else (0.2 if fam == "one-stage" else 0.3) * size / 320
                row = dict(cfg, point_id=point_id(cfg), family=fam, status="ok", n_samples=len(s),
                           lat_p50_ms=np.median(s), lat_p90_ms=np.percentile(s, 90), lat_p99_ms=np.percentile(s, 99),
                           lat_p50_ci_lo_ms=np.median(s) * 0.99, lat_p50_ci_hi_ms=np.median(s) * 1.01,
                           lat_cov=s.std() / s.mean(), fps=1000 / np.median(s), noisy=False,
                           stage_backbone_ms=base * 0.6, stage_head_ms=base * 0.3, stage_unattributed_ms=base * 0.05,
                           rss_imports_mib=100.0, rss_loaded_mib=150.0, rss_peak_mib=200.0 + size / 2,
                           map=m, map_ci_lo=m - 0.03, map_ci_hi=m + 0.03, untrained=untrained)
                if not latency:  # a point stored without its latency figures
                    row = {k: v for k, v in row.items() if not k.startswith("lat_")}
                rd.write_point(row, s.tolist())
    cfg = dict(model="broken", weights="none", size=320, proposals=0, backend="ort", intra_threads=1,
               inter_threads=1, exec_mode="sequential", opt_level="all", affinity=0, concurrency=1)
    rd.write_point(dict(cfg, point_id=point_id(cfg), status="failed", reason="timed out after 30 s <i>"), [])
    rd.finish()
    rd.close()
    return path


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    return _write_run(tmp_path_factory.mktemp("rep") / "run")


@pytest.fixture(scope="module")
def html_report(run_dir, tmp_path_factory):
    out = tmp_path_factory.mktemp("out") / "report.html"
    render_html(run_dir, out)
    return out


def test_self_contained_and_escaped(html_report):
    text = html_report.read_text()
    assert "<script" not in text.lower()                       # the model name came out escaped
    assert "&lt;script&gt;alert(1)&lt;/script&gt;det" in text
    assert "Test CPU &lt;b&gt;" in text and "timed out after 30 s &lt;i&gt;" in text
    assert not re.search(r"""(src|href)=["']?(https?:|//|file:)""", text)  # nothing fetched from outside
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', text)
    assert len(images) >= 6
    assert all(base64.b64decode(i)[:8] == b"\x89PNG\r\n\x1a\n" for i in images)


def test_sections_of_a_design_review(html_report):
    text = html_report.read_text()
    for heading in ("The question", "Environment", "Method", "Frontier", "Stage breakdown",
                    "Latency distributions", "Accuracy", "Memory", "All points", "Caveats"):
        assert f"<h2>{heading}" in text, heading
    assert "What is timed" in text and "Repetitions per point: 60 to 60" in text
    assert "Timed region, backend ort: onnxruntime InferenceSession.run" in text  # measure's own statement
    assert "0.240 [0.210, 0.270]" in text                      # two-stage at 256 px: 0.3 * 256 / 320, CI +-0.03
    assert "no guarantee" in text and "safety-relevant deployment" in text
    assert "No extrapolation" in text and "One host" in text
    assert "1 configuration(s) failed" in text


def test_budget_answer_and_untrained_caveats(tmp_path):
    run = _write_run(tmp_path / "untrained", untrained=True)
    out = render_html(run, tmp_path / "r.html", budget_ms=10)
    text = out.read_text()
    assert "Best within p50 &lt;= 10 ms" in text and "ranked by latency only" in text
    assert "Untrained weights" in text and "Accuracy unavailable" in text


def test_a_host_without_latency_figures_gets_a_line_not_a_traceback(tmp_path):
    # Found by a helper: a host whose successful points all lack the ranked latency has an
    # empty frontier, and the report's answer section took the fastest of nothing.
    good = _write_run(tmp_path / "a")
    bare = _write_run(tmp_path / "b", host="edge", latency=False)
    text = render_markdown([good, bare], tmp_path / "two.md").read_text()
    assert "Host edge: no successful configuration recorded" in text
    text = render_markdown(bare, tmp_path / "one.md").read_text()
    assert "nothing to rank" in text


def test_markdown_from_a_bare_frame(run_dir, tmp_path):
    # A points frame with no samples or metadata still renders; Markdown escapes names too.
    df = pd.read_csv(run_dir / "points.csv")
    md = render_markdown(df, tmp_path / "r.md")
    text = md.read_text()
    # Backslash escapes, not HTML entities (CommonMark spec, "Backslash escapes": an escaped
    # ASCII punctuation character is literal text, so the tag stays inert but reads as typed).
    assert "&lt;" not in text and "&#x27;" not in text and "&amp;" not in text
    assert "\\<script>alert(1)\\</script>det" in text
    prose = re.sub(r"```.*?```", "", text, flags=re.S)   # code blocks show text verbatim
    # CommonMark "Raw HTML": only "<" opens a tag; "&" matters only as an entity reference
    assert not re.search(r"(?<!\\)<|(?<!\\)&#?\w+;", prose), "an unescaped tag or entity outside code blocks"
    # nothing else is escaped: versions and code spans read as written
    assert not re.search(r"\d\\\.", text) and "\\`" not in text
    pngs = sorted((tmp_path / "r_files").glob("*.png"))
    assert len(pngs) >= 6 and all(f"r_files/{p.name}" in text for p in pngs)
    assert "## Frontier" in text and "> **Caution.**" in text
    # a bare frame recorded no timed region: the report says so instead of asking today's code
    assert "Timed region, backend ort: not recorded" in text


def test_markdown_escape_of_names():
    from speedbench.report.render import _cell, _md

    # CommonMark: a leading "#", "-" or "1." starts a heading / list; "|" splits a table cell.
    assert _md("# not a heading") == "\\# not a heading" and _md("1. x") == "1\\. x"
    assert _md("a|b") == "a\\|b" and _cell("a|b\nc") == "a\\|b c"
    assert _md("it's 3.2 ms") == "it's 3.2 ms"   # nothing Markdown interprets: left as written
    # only a number followed by "." and a space starts an ordered list; a pair of backticks is
    # the code span the writer meant; "-" starts a bullet only before a space
    assert _md("0.1.0") == "0.1.0" and _md("3.11.7 on x") == "3.11.7 on x"
    assert _md("run `speedbench pick`") == "run `speedbench pick`" and _md("-k 1,2") == "-k 1,2"
    assert _md("- item") == "\\- item" and _md("a & b &amp; c") == "a & b \\&amp; c"


def test_cli(run_dir, tmp_path, capsys):
    assert main(["report", str(run_dir), "-o", str(tmp_path / "a.html"), "--markdown"]) == 0
    assert (tmp_path / "a.html").exists() and (tmp_path / "a.md").exists()
    assert main(["report", str(tmp_path / "missing"), "-o", str(tmp_path / "b.html")]) == 2
    assert main(["report", str(run_dir), "-o", str(tmp_path)]) == 2
    assert "is a directory" in capsys.readouterr().err


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(not _chromium(), reason="Chromium not installed (Debian package `chromium`); "
                                            "the screenshot check needs a real browser")
def test_renders_in_headless_chromium(html_report, tmp_path):
    shot = tmp_path / "shot.png"
    cmd = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1280,2000",
           html_report.as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.exists() and shot.stat().st_size > 10_000
    from matplotlib.image import imread

    img = imread(shot)
    assert img.shape[1] == 1280
    # Not a blank page: rendered text and figures give plenty of distinct grey levels.
    assert img[..., :3].std() > 0.05 and len(np.unique((img[..., 0] * 255).astype(int))) > 50


def test_caveat_for_sizes_outside_the_weights_training_sizes(monkeypatch):
    # The caveat comes from the training sizes the run recorded when it was measured, never from
    # today's manifest: re-rendering an old run after retraining must not change its caveats.
    import speedbench.zoo.weights as weights
    from speedbench.analyse.runs import Run
    from speedbench.report.caveats import _outside_training
    from speedbench.sweep.pipeline import run_facts
    from speedbench.sweep.plan import PlannedPoint

    planned = [PlannedPoint.from_row({"model": m, "weights": w, "size": 320, "backend": "ort", "intra_threads": 1})
               for m, w in (("demo_ssdlite", "demo"), ("demo_fcos", "file:x.pt"))]
    facts = run_facts(planned)
    # README: demo_ssdlite's second phase trained at 256-352 px; a user's checkpoint records nothing
    assert min(facts["trained_sizes"]["demo_ssdlite|demo"]) == 256
    assert max(facts["trained_sizes"]["demo_ssdlite|demo"]) == 352
    assert facts["trained_sizes"]["demo_fcos|file:x.pt"] is None
    assert facts["timed_regions"] == {"ort": __import__("speedbench.measure.backends.ort").measure.backends.ort.TIMED_REGION}

    ok = pd.DataFrame({"model": ["demo_ssdlite", "demo_ssdlite", "demo_ssdlite", "demo_fcos", "ssd300_vgg16"],
                       "weights": ["demo", "demo", "demo", "demo", "torchvision"],
                       "size": [192, 256, 352, 320, 128]})
    recorded = Run(points=ok, meta={"trained_sizes": {"demo_ssdlite|demo": [256, 288, 320, 352],
                                                      "demo_fcos|demo": [320], "ssd300_vgg16|torchvision": None}})
    monkeypatch.setattr(weights, "demo_manifest", lambda: (_ for _ in ()).throw(AssertionError("manifest read")))
    (line,) = _outside_training(ok, [recorded])
    assert "demo_ssdlite at 192 px (its demo weights were trained at 256-352 px)" in line
    assert "demo_fcos" not in line and "ssd300" not in line      # inside its range / no record
    assert _outside_training(ok[ok["model"] == "demo_fcos"], [recorded]) == []
    # a run made before the record existed says so instead of guessing
    (old,) = _outside_training(ok, [Run(points=ok)])
    assert "not recorded" in old and "demo_ssdlite" in old and "demo_fcos" in old


