import numpy as np
import pytest

from pixelfit.data import Binarizer, otsu_threshold, stratified_split
from pixelfit.errors import PixelfitError


def test_fixed_is_greater_or_equal():
    imgs = np.array([[[99, 100, 101]]], np.uint8)
    assert Binarizer.parse("fixed:100").transform(imgs).tolist() == [[[False, True, True]]]


def test_invert_flips_bits():
    imgs = np.array([[[99, 100, 101]]], np.uint8)
    assert Binarizer.parse("fixed:100,invert").transform(imgs).tolist() == [[[True, False, False]]]


def test_otsu_bimodal():
    # Two well separated grey levels: any threshold between them splits perfectly; Otsu picks the
    # lower level itself (dark class is <= t) -- common practice for integer images.
    vals = np.array([10] * 50 + [200] * 50, np.uint8)
    t = otsu_threshold(vals)
    assert 10 <= t < 200
    b = Binarizer("otsu").fit(vals.reshape(1, 10, 10))
    assert b.threshold == t
    assert b.transform(vals.reshape(1, 10, 10)).sum() == 50


def test_otsu_constant_image():
    assert otsu_threshold(np.full(10, 7, np.uint8)) == 7
    assert not Binarizer("otsu-patch").transform(np.full((1, 3, 3), 7, np.uint8)).any()


def test_per_patch_methods_follow_each_patch():
    dark = np.array([[10, 10], [40, 40]], np.uint8)
    bright = dark + 150
    imgs = np.stack([dark, bright])
    for m in ("otsu-patch", "mean-patch"):
        out = Binarizer(m).transform(imgs)
        assert out[0].tolist() == [[False, False], [True, True]]
        assert np.array_equal(out[0], out[1])


def test_unfitted_otsu_refused():
    with pytest.raises(PixelfitError):
        Binarizer("otsu").transform(np.zeros((1, 2, 2), np.uint8))


def test_bad_specs():
    for spec in ("fixed", "fixed:abc", "nope", "fixed:300"):
        with pytest.raises(PixelfitError):
            Binarizer.parse(spec)


def test_round_trip_settings():
    b = Binarizer("fixed", 42.0, True)
    assert Binarizer.from_dict(b.to_dict()) == b


def test_split_stratified_and_reproducible(rng):
    y = rng.random(400) < 0.2
    a = stratified_split(y, 0.25, seed=3)
    b = stratified_split(y, 0.25, seed=3)
    c = stratified_split(y, 0.25, seed=4)
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)
    assert a.sum() == 100
    # class shares in the held-out part match the whole within one patch
    assert abs(y[a].sum() - 0.25 * y.sum()) <= 1


def test_split_needs_two_per_class():
    with pytest.raises(PixelfitError):
        stratified_split(np.array([True, False, False, False]), 0.25)
