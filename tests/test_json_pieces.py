"""A large detections file parsed a piece at a time (jsonio.array_pieces, results.read_detections).

The reference is Python's json module (the standard library) parsing the whole text. The
pieces may give up (yield None), and the caller then parses the whole text, but they
must never give a different list; read_detections must give the same arrays and the same
error message, counted from the file's start, as reading the file whole.
"""
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from speedbench.data import jsonio
from speedbench.errors import UserError
from speedbench.evaluate import GroundTruth, results

pytest.importorskip("orjson")

FUZZ = settings(max_examples=80, derandomize=True, database=None, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def joined(text: str, size: int):
    """The pieces' lists joined; None where array_pieces declines or a piece gives up."""
    pieces = jsonio.array_pieces(text.encode("utf-8"), size)
    if pieces is None:
        return None
    out = []
    for items in pieces:
        if items is None:
            return None
        out += items
    return out


def count_pieces(text: str, size: int) -> int:
    return sum(1 for _ in jsonio.array_pieces(text.encode("utf-8"), size))


def detections(n: int, seed: int = 0) -> list[dict]:
    rng = np.random.default_rng(seed)
    return [{"image_id": int(rng.integers(1, 9)), "category_id": int(rng.integers(1, 4)),
             "bbox": [float(v) for v in rng.uniform(0, 60, 4)], "score": float(rng.random())}
            for _ in range(n)]


@pytest.mark.parametrize("dump", [
    json.dumps,                                              # "}, {" between elements
    lambda v: json.dumps(v, separators=(",", ":")),          # "},{"
    lambda v: json.dumps(v, indent=2),                       # "},\n  {"
    lambda v: " \n" + json.dumps(v).replace("}, {", "}\r\n,\t{") + "\n ",
], ids=["default", "compact", "indented", "odd-whitespace"])
def test_pieces_join_to_the_whole_array(dump):
    text = dump(detections(300))
    for size in (1, 57, 1000, 5000):
        assert joined(text, size) == json.loads(text)
    assert count_pieces(text, 1000) > 5  # the text really was cut


def test_declines_what_is_not_a_large_array():
    assert jsonio.array_pieces(b'{"a": 1}' + b" " * 100, 10) is None
    assert jsonio.array_pieces(json.dumps(detections(3)).encode(), 10_000) is None  # short
    assert joined("[1, 2, 3, 4, 5, 6, 7, 8]", 2) == [1, 2, 3, 4, 5, 6, 7, 8]  # no "}, {": one piece


# Strings and keys full of the characters the cutter looks for, and nested objects in lists:
# cuts inside them must make a piece fail, never a different result.
_tricky = st.text(alphabet='{}[],: "\\ab\n', max_size=6)
_leaves = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**63 - 1),
                    st.floats(allow_nan=False, allow_infinity=False), _tricky)
_values = st.recursive(_leaves, lambda kids: st.one_of(st.lists(kids, max_size=4),
                                                       st.dictionaries(_tricky, kids, max_size=4)),
                       max_leaves=20)


@FUZZ
@given(items=st.lists(st.dictionaries(_tricky, _values, max_size=4), max_size=12),
       size=st.integers(1, 80), indent=st.sampled_from([None, 1]))
def test_pieces_never_differ_from_the_whole_parse(items, size, indent):
    text = json.dumps(items, indent=indent)
    got = joined(text, size)
    assert got is None or got == json.loads(text)


GT = {"images": [{"id": i, "file_name": f"{i}.png", "width": 64, "height": 64} for i in range(1, 9)],
      "annotations": [], "categories": [{"id": c, "name": f"c{c}"} for c in range(1, 4)]}


def test_read_detections_in_pieces_equals_the_whole_read(tmp_path, monkeypatch):
    path = tmp_path / "dets.json"
    dets = detections(400, seed=1)
    path.write_text(json.dumps(dets))
    ground = GroundTruth(GT)
    whole = results.parse_detections(json.loads(path.read_text()), ground)
    seen = []
    real = jsonio.array_pieces

    def counting(data, size):
        pieces = real(data, size)
        return None if pieces is None else (seen.append(p) or p for p in pieces)
    monkeypatch.setattr(results, "array_pieces", counting)
    monkeypatch.setattr(results, "_PIECE_BYTES", 2000)
    got = results.read_detections(path, ground)
    assert len(seen) > 5  # read in pieces
    for name in ("img", "cat", "box", "score", "area"):
        assert np.array_equal(getattr(got, name), getattr(whole, name)), name


@pytest.mark.parametrize("bad, why", [
    ({"bbox": [1, 2, -3, 4]}, "negative width"),
    ({"image_id": 99}, "not an image of the ground truth"),
    ({"score": "high"}, "score must be a number"),
    ({"bbox": [1, 2, 3]}, "bbox must be"),
    ({"score": float("nan")}, "score must be a finite number"),  # NaN: orjson refuses the piece
])
def test_an_error_in_a_later_piece_names_the_entry_counted_from_the_start(tmp_path, monkeypatch, bad, why):
    path = tmp_path / "dets.json"
    dets = detections(400, seed=2)
    dets[333] = {**dets[333], **bad}
    path.write_text(json.dumps(dets))
    monkeypatch.setattr(results, "_PIECE_BYTES", 2000)
    with pytest.raises(UserError, match=rf"dets\.json: detection \[333\]: .*{why}"):
        results.read_detections(path, GroundTruth(GT))
    path.write_text(json.dumps(dets)[:-1])  # cut short: not JSON at all
    with pytest.raises(UserError, match=r"dets\.json: not a readable JSON file"):
        results.read_detections(path, GroundTruth(GT))
