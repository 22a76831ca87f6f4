"""Fuzz the loaders with Hypothesis: whatever the bytes, each loader accepts or refuses with our
own error type, and never raises anything else.

The normal suite runs the ``pixelfit-fuzz`` profile (1,000 examples per test, derandomized so CI
is repeatable). ``PIXELFIT_FUZZ=deep`` selects ``pixelfit-fuzz-deep``: 20,000 fresh random
examples per test, for an occasional longer search (see README, "What pixelfit refuses and why").
"""
from __future__ import annotations

import copy
import io
import json
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from PIL import Image

from pixelfit.data import MAX_SIDE, Binarizer, Dataset, load_dataset, read_patch
from pixelfit.errors import DatasetError, RuleFileError
from pixelfit.firmware import default_vectors, header_text, vectors_text
from pixelfit.ladder import prepare, train_rung
from pixelfit.rulefile import parse_rule, rule_document

settings.register_profile("pixelfit-fuzz", max_examples=1000, deadline=None, derandomize=True, database=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
settings.register_profile("pixelfit-fuzz-deep", max_examples=20_000, deadline=None, derandomize=False,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
FUZZ = settings.get_profile("pixelfit-fuzz-deep" if os.environ.get("PIXELFIT_FUZZ") == "deep" else "pixelfit-fuzz")


def _one_line(message: str) -> bool:
    return bool(message.strip()) and "\n" not in message


# ---- mutations of valid files ---------------------------------------------------------------------


@st.composite
def mutated(draw, seeds: list[bytes]) -> bytes:
    """A valid file with a few bytes overwritten, cut, inserted, or set to boundary values."""
    data = bytearray(draw(st.sampled_from(seeds)))
    for _ in range(draw(st.integers(1, 6))):
        op = draw(st.sampled_from(["set", "cut", "insert", "word"]))
        pos = draw(st.integers(0, max(0, len(data) - 1)))
        if op == "set" and data:
            data[pos] = draw(st.integers(0, 255))
        elif op == "cut":
            data = data[:pos]
        elif op == "insert":
            data[pos:pos] = draw(st.binary(min_size=1, max_size=8))
        else:  # sizes and offsets in headers are where decoders break
            data[pos : pos + 4] = draw(st.sampled_from([b"\xff\xff\xff\xff", b"\x00\x00\x00\x00",
                                                        b"\x7f\xff\xff\xff", b"\x00\x01\x00\x00"]))
    return bytes(data)


def _image_seeds() -> list[bytes]:
    ramp = (np.arange(64, dtype=np.uint8).reshape(8, 8) * 4)
    rgb = np.stack([ramp, ramp[::-1], ramp.T], axis=-1)
    images = [
        ("PNG", Image.fromarray(ramp)), ("PNG", Image.fromarray(rgb)), ("PNG", Image.fromarray(ramp).convert("P")),
        ("PNG", Image.fromarray(ramp >= 128)), ("PNG", Image.fromarray(ramp.astype(np.uint16) * 257)),
        ("PNG", Image.fromarray(np.dstack([rgb, ramp]))), ("BMP", Image.fromarray(ramp)), ("BMP", Image.fromarray(rgb)),
        ("TIFF", Image.fromarray(ramp)), ("TIFF", Image.fromarray(ramp.astype(np.uint16) * 257)),
        ("TIFF", Image.fromarray(ramp.astype(np.float32) / 255)), ("TIFF", Image.fromarray(rgb)),
        ("PPM", Image.fromarray(ramp)), ("PPM", Image.fromarray(rgb)), ("JPEG", Image.fromarray(ramp)),
        ("GIF", Image.fromarray(ramp)),
    ]
    seeds = []
    for fmt, im in images:
        buf = io.BytesIO()
        im.save(buf, fmt)
        seeds.append(buf.getvalue())
    return seeds


IMAGE_SEEDS = _image_seeds()


@pytest.fixture(scope="module")
def scratch(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


@FUZZ
@given(data=st.one_of(st.binary(max_size=600), mutated(IMAGE_SEEDS)), suffix=st.sampled_from([".png", ".tif", ".jpg"]))
def test_fuzz_read_patch_returns_a_patch_or_refuses(scratch, data, suffix):
    path = scratch / f"patch{suffix}"
    path.write_bytes(data)
    try:
        arr = read_patch(path)
    except ValueError as exc:  # the documented refusal
        assert _one_line(str(exc)), repr(str(exc))
        return
    assert isinstance(arr, np.ndarray) and arr.dtype == np.uint8 and arr.ndim == 2
    assert 1 <= arr.shape[0] <= MAX_SIDE and 1 <= arr.shape[1] <= MAX_SIDE


# ---- random .npz contents -------------------------------------------------------------------------

DTYPES = st.sampled_from(["u1", "i2", "i8", "u2", "f4", "f8", "c8", "?", "U4", "S4", "M8[D]"])


@st.composite
def npz_members(draw) -> dict:
    """Arrays under the names load_npz reads (and others), shapes often just right, dtypes anything."""
    n = draw(st.integers(0, 6))
    h, w = draw(st.integers(0, 3)), draw(st.integers(0, 3))
    members = {}
    for key, right_shape in (("images", (n, h, w)), ("labels", (n,)), ("names", (n,))):
        if draw(st.integers(0, 9)) == 0:
            continue  # leave the array out
        shape = right_shape if draw(st.booleans()) else draw(hnp.array_shapes(min_dims=0, max_dims=4, max_side=4))
        if draw(st.integers(0, 15)) == 0:  # an object array: written as a pickle, must be refused
            members[key] = np.array([object()] * int(np.prod(shape)), dtype=object).reshape(shape) \
                if int(np.prod(shape)) else np.array([None, "x"], dtype=object)
            continue
        dtype = "u1" if key == "images" and draw(st.booleans()) else draw(DTYPES)
        if key == "labels" and draw(st.booleans()):
            members[key] = np.array(draw(st.lists(st.sampled_from(["a", "b", "", " ", "\ud800", "c\nd"]),
                                                  min_size=shape[0] if len(shape) else 0,
                                                  max_size=shape[0] if len(shape) else 0))
                                    or np.zeros(0, "U1")).reshape(shape) if len(shape) == 1 else \
                np.array("a")
            continue
        members[key] = draw(hnp.arrays(np.dtype(dtype), shape))
    if draw(st.integers(0, 9)) == 0:
        members[draw(st.text(min_size=1, max_size=5))] = np.zeros(2)
    return members


def _npz_bytes(members: dict) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **members)  # saving may pickle object arrays; loading must not unpickle them
    return buf.getvalue()


_NPZ_SEED = _npz_bytes({"images": np.arange(4 * 9, dtype=np.uint8).reshape(4, 3, 3),
                        "labels": np.array(["a", "b", "a", "b"]), "names": np.array(["w", "x", "y", "z"])})


@st.composite
def npz_files(draw) -> bytes:
    if draw(st.integers(0, 3)) == 0:
        return draw(mutated([_NPZ_SEED]))
    try:
        data = _npz_bytes(draw(npz_members()))
    except (ValueError, TypeError, UnicodeEncodeError):
        assume(False)  # numpy cannot write it (a key it rejects); not an input a file can hold
    return data


@FUZZ
@given(data=npz_files())
def test_fuzz_npz_loads_or_refuses(scratch, data):
    path = scratch / "fuzz.npz"
    path.write_bytes(data)
    try:
        ds = load_dataset(path)
    except DatasetError as exc:
        assert _one_line(str(exc)), repr(str(exc))
        return
    n = len(ds)
    assert ds.images.dtype == np.uint8 and ds.images.ndim == 3 and n > 0
    assert 1 <= min(ds.shape) and max(ds.shape) <= MAX_SIDE
    assert ds.labels.shape == (n,) and len(ds.names) == n and len(ds.counts) >= 2
    json.dumps({"labels": ds.labels.tolist(), "names": ds.names}, ensure_ascii=False).encode("utf-8")


# ---- rule files -----------------------------------------------------------------------------------

RULE_FAMILIES = [("constant", 0), ("lut", 2), ("nb", 3), ("logistic", 3), ("tree", 2), ("mlp", 2), ("memorize", 16)]


@pytest.fixture(scope="module")
def rule_docs() -> list[dict]:
    rng = np.random.default_rng(11)
    imgs = (rng.random((80, 4, 4)) * 255).astype(np.uint8)
    lab = np.where((imgs[:, 1, 1] > 127) ^ (rng.random(80) < 0.1), "open", "capped")
    prep = prepare(Dataset(imgs, lab, [f"#{i}" for i in range(80)], "generated", "npz"), Binarizer.parse("otsu"))
    return [rule_document(prep, train_rung(prep, fam, size, folds=0)) for fam, size in RULE_FAMILIES]


JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=8), inner, max_size=5),
    max_leaves=25,
)


def _paths(obj, prefix=()):
    """Every place in a parsed JSON document, as a tuple of keys and indices."""
    yield prefix
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _paths(v, prefix + (i,))


def _pick_path(draw, doc) -> list:
    """A place in the document: half the time any place alike (most are numbers deep in the model),
    half the time by descending from the top and stopping at random, so that each section is as
    likely as the next however many numbers it holds."""
    if draw(st.booleans()):
        places = [p for p in _paths(doc) if p]
        return list(draw(st.sampled_from(places))) if places else []
    path, node = [], doc
    while isinstance(node, (dict, list)) and len(node):
        key = draw(st.sampled_from(list(node) if isinstance(node, dict) else range(len(node))))
        path.append(key)
        node = node[key]
        if draw(st.integers(0, 2)) == 0:
            break
    return path


def _near(value, draw):
    """A value close to ``value`` that a careless check lets through."""
    if isinstance(value, bool):
        return draw(st.sampled_from([not value, 0, 1, None, "true"]))
    if isinstance(value, (int, float)):
        return draw(st.sampled_from([-1, 0, 1, 2, 63, 64, 65, 10**9, -(10**9), 0.5, -0.5, 1.5, 2**31, 2**63,
                                     float(value) + 0.5, -value, [value], str(value), 1e308, -1e308,
                                     "*/ int injected; /*"]))
    if isinstance(value, str):
        return draw(st.sampled_from(["", "x", value * 2, value[:-1], "*/ int injected; /*", "\n", "00", "ff" * 40]))
    if isinstance(value, list):
        if value and draw(st.booleans()):
            i = draw(st.integers(0, len(value) - 1))
            return value[:i] + value[i + 1:] if draw(st.booleans()) else value + [value[i]]
        return draw(st.sampled_from([[], [value], value * 2, {}]))
    return draw(st.sampled_from([{}, [], None, [1], "*/ int injected; /*", 7]))


@st.composite
def mutated_rules(draw, docs: list[dict]) -> dict:
    doc = copy.deepcopy(draw(st.sampled_from(docs)))
    for _ in range(draw(st.integers(1, 3))):
        path = _pick_path(draw, doc)
        if not path:
            break
        parent = doc
        for key in path[:-1]:
            parent = parent[key]
        last = path[-1]
        op = draw(st.sampled_from(["near", "near", "random", "delete", "add"]))
        if op == "near":
            parent[last] = _near(parent[last], draw)
        elif op == "random":
            parent[last] = draw(JSON_VALUES)
        elif op == "delete":
            del parent[last]
        elif isinstance(parent, dict):
            parent[draw(st.text(max_size=6))] = draw(JSON_VALUES)
        else:
            parent.insert(last, draw(JSON_VALUES))
    return doc


def _use(rule) -> None:
    """Everything a loaded rule offers; each must work or refuse with RuleFileError."""
    rng = np.random.default_rng(0)
    h, w = rule.shape
    X = rng.random((5, h * w)) < 0.5
    for call in (lambda: rule.predict(X), lambda: rule.scores(X), lambda: rule.predict(X, 0.5),
                 lambda: rule.binarize(rng.integers(0, 256, (3, h, w), dtype=np.uint8)), rule.pixels_used,
                 lambda: rule.predict(np.zeros((2, h * w + 1), bool))):
        try:
            call()
        except RuleFileError:
            pass
    try:
        text = header_text(rule, "r") + vectors_text(rule, "r", default_vectors(rule, 4), "r.h")
    except RuleFileError:
        return
    # Nothing from the file may leave a C comment and become code ("/*" and "*/" are broken up).
    assert "injected" not in text.replace("* / int injected; / *", "")


def _parse_or_refuse(doc) -> None:
    try:
        rule = parse_rule(doc)
    except RuleFileError as exc:
        assert _one_line(str(exc)), repr(str(exc))
        return
    _use(rule)


@FUZZ
@given(value=JSON_VALUES)
def test_fuzz_random_json_is_refused(value):
    for doc in (value, json.dumps(value)):
        with pytest.raises(RuleFileError):
            parse_rule(doc)


@FUZZ
@given(data=st.data())
def test_fuzz_mutated_rule_files_load_or_refuse(rule_docs, data):
    doc = data.draw(mutated_rules(rule_docs))
    _parse_or_refuse(doc)
    _parse_or_refuse(json.dumps(doc))


@FUZZ
@given(data=st.data())
def test_fuzz_damaged_rule_file_bytes_load_or_refuse(rule_docs, data):
    seeds = [json.dumps(d).encode() for d in rule_docs]
    _parse_or_refuse(data.draw(st.one_of(mutated(seeds), st.binary(max_size=200))))


def test_valid_rule_documents_load(rule_docs):
    # The fuzz above starts from these: each must load, or the mutations prove nothing.
    for doc in rule_docs:
        _use(parse_rule(doc))
        _use(parse_rule(json.dumps(doc)))
