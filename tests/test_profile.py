"""Profile validation: every bad input is one line naming the file and key path; CLI exits 2."""
import pytest

from speedbench.errors import UserError
from speedbench.sweep.profile import load_profile, parse_profile

GOOD = """
[run]
name = "t"
timeout_s = 60

[dataset]
scenes = {count = 4, seed = 1}

[sweep]
sizes = [320, "native"]
proposals = [100, "default"]

[[models]]
id = "m1"
weights = "none"

[[threads]]
intra = 1
"""


def test_good_profile_parses_with_defaults():
    p = parse_profile(GOOD, "good.toml")
    assert p.name == "t" and p.timeout_s == 60 and p.scenes_count == 4 and p.scenes_seed == 1
    assert p.sizes == (320, "native") and p.proposals == (100, "default")
    assert p.backends == ("ort",) and p.opt_levels == ("all",) and p.concurrency == (1,)
    assert p.threads[0].inter == 1 and p.threads[0].mode == "sequential" and p.threads[0].affinity == 0
    assert p.host  # empty label falls back to the hostname
    assert str(p.output_dir()) == "runs/t"
    assert "subgraph_check" not in p.repetitions       # the sub-graph check is opt-in
    on = parse_profile(GOOD.replace("[sweep]", "[repetitions]\nsubgraphs = true\n[sweep]"), "good.toml")
    assert on.repetitions["subgraph_check"] is True


def _replace(old, new):
    assert old in GOOD
    return GOOD.replace(old, new)


BAD = [
    # (profile text, expected fragment of the message: the key path and the problem)
    ("[run\nname='x'", "TOML syntax error"),
    (_replace('timeout_s = 60', 'timeout_s = 60\ncolour = "red"'), "run.colour: unknown key"),
    (_replace('[[threads]]\nintra = 1', '[[threads]]\nintra = 1\nintr = 2'), "threads[0].intr: unknown key"),
    (_replace('name = "t"', 'name = 5'), "run.name: expected a string, got an integer"),
    (_replace('sizes = [320, "native"]', 'sizes = []'), "sweep.sizes: must not be empty"),
    (_replace('sizes = [320, "native"]', 'sizes = [320, 16]'), "sweep.sizes[1]: 16 is out of range 32..4096"),
    (_replace('sizes = [320, "native"]', 'sizes = [320, "big"]'), "sweep.sizes[1]: 'big' is not a size"),
    (_replace('proposals = [100, "default"]', 'proposals = [0]'), "sweep.proposals[0]: 0 is out of range"),
    (_replace('intra = 1', 'intra = true'), "threads[0].intra: expected an integer, got a boolean"),
    (_replace('intra = 1', 'intra = 1\nmode = "fast"'), "threads[0].mode: 'fast' is not one of sequential, parallel"),
    (_replace('timeout_s = 60', 'timeout_s = 0'), "run.timeout_s: 0 is out of range"),
    (_replace('weights = "none"', 'weights = "imagenet"'), "models[0].weights: 'imagenet' is not one of"),
    (_replace('[[models]]\nid = "m1"\nweights = "none"', ''), "models: missing required key"),
    (_replace('[[models]]\nid = "m1"\n', '[[models]]\n'), "models[0].id: missing required key"),
    (_replace('scenes = {count = 4, seed = 1}', 'scenes = {count = 4}\npath = "x.json"'),
     "dataset: give exactly one of `path` or `scenes`"),
    (_replace('scenes = {count = 4, seed = 1}', 'scenes = {count = -3}'), "dataset.scenes.count: -3 is out of range"),
    (_replace('[sweep]', '[sweep]\nbackends = ["gpu"]'), "sweep.backends[0]: 'gpu' is not one of ort, eager"),
    (_replace('[sweep]', '[sweep]\nconcurrency = [1, 1]'), "sweep.concurrency: lists 1 more than once"),
    (_replace('[sweep]', '[repetitions]\nmin_reps = 50\nmax_reps = 10\n[sweep]'),
     "repetitions.max_reps: must be >= repetitions.min_reps"),
    (_replace('[sweep]', '[repetitions]\nrel_ci = 1.5\n[sweep]'), "repetitions.rel_ci: 1.5 is out of range"),
    (_replace('[sweep]', '[repetitions]\nsubgraphs = "yes"\n[sweep]'), "repetitions.subgraphs: expected"),
    (_replace('[sweep]', '[repetitions]\nmax_seconds = 120\n[sweep]'), "repetitions.max_seconds: must be below run.timeout_s"),
    (_replace('[[threads]]\nintra = 1', '[[threads]]\nintra = 1\n[[threads]]\nintra = 1'),
     "threads[1]: same thread setting listed twice"),
    ("threads = 4\n" + _replace('[[threads]]\nintra = 1', ''), "threads: expected one or more [[threads]] tables"),
    (_replace('[[models]]\nid = "m1"\nweights = "none"',
              '[[models]]\nid = "m1"\nweights = "none"\nsizes = [64.5]'), "models[0].sizes[0]: expected an integer, got a number"),
]


@pytest.mark.parametrize("text,fragment", BAD, ids=[f"bad{i:02d}" for i in range(len(BAD))])
def test_bad_profile_one_line_error(text, fragment):
    with pytest.raises(UserError) as exc:
        parse_profile(text, "bad.toml")
    msg = str(exc.value)
    assert "\n" not in msg
    assert msg.startswith("bad.toml: ")
    assert fragment in msg, msg


def test_bad_profiles_through_cli_exit_2(tmp_path, capsys):
    from speedbench.cli import main

    for i, (text, fragment) in enumerate(BAD):
        path = tmp_path / f"bad{i}.toml"
        path.write_text(text)
        assert main(["sweep", str(path), "--dry-run"]) == 2
        err = capsys.readouterr().err.strip()
        assert err.startswith("speedbench: error: ") and fragment in err, err
        assert len(err.splitlines()) == 1  # no traceback


def test_missing_profile_file(tmp_path):
    with pytest.raises(UserError, match="nope.toml: profile not found"):
        load_profile(tmp_path / "nope.toml")
    with pytest.raises(UserError, match="is a directory"):
        load_profile(tmp_path)


def test_shipped_profiles_parse():
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent / "profiles"
    files = sorted(root.glob("*.toml"))
    assert {f.stem for f in files} >= {"demo"} and len(files) >= 4
    for f in files:
        if "\nonnx = " in f.read_text():
            continue   # needs its external graph made first: test_adapt_roundtrip.py parses it
        p = load_profile(f)
        assert p.name
