"""The k-pixel search engine against the brute-force definition of the optimal truth table."""
from __future__ import annotations

import itertools
from math import comb

import numpy as np
import pytest

from pixelfit.models import LutRule, SearchCancelled
from pixelfit.models import lut_engine as engine
from pixelfit.models.lut_engine import CountIndex, beam_best, colex_subsets, exhaustive_best


def brute_errors(X, y, k):
    """Every k-subset in lexicographic order (itertools.combinations) with its optimal error.

    The definition written directly: code each patch's pattern on the set, count per class with
    numpy.bincount, and label each pattern with its majority (error = the minority count).
    """
    combos = np.array(list(itertools.combinations(range(X.shape[1]), k)), dtype=np.intp)
    weights = 1 << np.arange(k)
    errs = []
    for S in combos:
        codes = X[:, S].astype(np.intp) @ weights
        errs.append(np.minimum(np.bincount(codes[y], minlength=2**k), np.bincount(codes[~y], minlength=2**k)).sum())
    return combos, np.array(errs, np.int64)


def random_case(seed, repeats=False):
    """Few pixels, few patches, skewed pixel rates: many sets tie on error."""
    rng = np.random.default_rng(seed)
    n, p = int(rng.integers(20, 400)), int(rng.integers(4, 10))
    X = rng.random((n, p)) < rng.uniform(0.05, 0.95, p)
    if repeats:  # few distinct patches, each many times: the weighted (bit-plane) packing
        X = X[rng.integers(0, 12, n)]
    y = rng.random(n) < rng.uniform(0.1, 0.6)
    return X, y


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("k", [1, 2, 3])
def test_optimum_and_tie_break_equal_brute_force(seed, k):
    X, y = random_case(seed, repeats=seed % 2 == 1)
    combos, errs = brute_errors(X, y, k)
    first = int(np.argmin(errs))  # argmin keeps the first minimum: lexicographic tie-break
    best, best_e, total = exhaustive_best(CountIndex(X, y), k)
    assert total == comb(X.shape[1], k)
    assert best_e[0] == errs[first]
    assert best[0].tolist() == combos[first].tolist()


@pytest.mark.parametrize("seed", range(4))
def test_keep_lists_the_best_in_error_then_lexicographic_order(seed):
    X, y = random_case(100 + seed)
    combos, errs = brute_errors(X, y, 3)
    order = np.argsort(errs, kind="stable")[:7]
    best, best_e, _ = exhaustive_best(CountIndex(X, y), 3, keep=7)
    assert best.tolist() == combos[order].tolist()
    assert best_e.tolist() == errs[order].tolist()


def test_data_with_ties_has_them():
    # The cases above are only a tie-break test if minima are shared; make sure some are.
    shared = 0
    for seed in range(8):
        X, y = random_case(seed, repeats=seed % 2 == 1)
        _, errs = brute_errors(X, y, 2)
        shared += int((errs == errs.min()).sum() > 1)
    assert shared >= 2


def test_repeated_patches_use_fewer_words_and_stay_exact(rng):
    distinct = rng.random((30, 12)) < 0.5
    X = distinct[rng.integers(0, 30, 3000)]
    y = rng.random(3000) < 0.3
    index = CountIndex(X, y)
    assert index.n_words < -(-int(y.sum()) // 64) + -(-int((~y).sum()) // 64)
    for k in (1, 2, 3, 4):
        combos, errs = brute_errors(X, y, k)
        best, best_e, _ = exhaustive_best(index, k, keep=3)
        order = np.argsort(errs, kind="stable")[:3]
        assert best.tolist() == combos[order].tolist() and best_e.tolist() == errs[order].tolist()


@pytest.mark.parametrize("k", [2, 3, 4])
def test_every_set_scored_right_with_and_without_tables(rng, k, monkeypatch):
    X = rng.random((150, 9)) < 0.4
    y = rng.random(150) < 0.5
    combos, errs = brute_errors(X, y, k)
    with_tables = CountIndex(X, y)
    for o in range(1, k + 1):
        with_tables.table(o)
    assert with_tables.subset_errors(combos).tolist() == errs.tolist()
    assert CountIndex(X, y).subset_errors(combos).tolist() == errs.tolist()  # AND + popcount only
    monkeypatch.setattr(engine, "TABLE_LIMIT", 0)  # no table fits: the search scores set by set
    best, best_e, _ = exhaustive_best(CountIndex(X, y), k, keep=4)
    order = np.argsort(errs, kind="stable")[:4]
    assert best.tolist() == combos[order].tolist() and best_e.tolist() == errs[order].tolist()


def test_units_cover_every_set_once_in_small_chunks(rng, monkeypatch):
    monkeypatch.setattr(engine, "CHUNK_WORDS", 3)  # one prefix per unit: many units per pixel
    X = rng.random((100, 11)) < 0.5
    y = rng.random(100) < 0.4
    combos, errs = brute_errors(X, y, 4)
    best, best_e, _ = exhaustive_best(CountIndex(X, y), 4, keep=len(combos))
    assert sorted(map(tuple, best.tolist())) == sorted(map(tuple, combos.tolist()))
    assert best_e.tolist() == np.sort(errs).tolist()


def test_threads_give_the_same_answer_and_stop_on_cancel(rng, monkeypatch):
    monkeypatch.setattr(engine, "PARALLEL_MIN_WORDS", 0)  # threads even for a small search
    monkeypatch.setattr(engine, "CHUNK_WORDS", 64)
    X = rng.random((500, 16)) < 0.5
    y = X[:, 3] ^ X[:, 9] ^ (rng.random(500) < 0.2)
    one = exhaustive_best(CountIndex(X, y), 3, keep=5, n_jobs=1)
    two = exhaustive_best(CountIndex(X, y), 3, keep=5, n_jobs=2)
    assert one[0].tolist() == two[0].tolist() and one[1].tolist() == two[1].tolist()
    seen = []
    with pytest.raises(SearchCancelled):
        exhaustive_best(CountIndex(X, y), 3, n_jobs=2, progress=lambda d, t: seen.append(d),
                        cancel=lambda: len(seen) >= 3)
    assert len(seen) == 3


def test_one_class_only_every_set_is_perfect():
    X = np.random.default_rng(3).random((50, 6)) < 0.5
    best, best_e, _ = exhaustive_best(CountIndex(X, np.zeros(50, bool)), 3)
    assert best[0].tolist() == [0, 1, 2] and best_e[0] == 0


def test_colex_ranks_count_up():
    index = CountIndex(np.zeros((3, 10), bool), np.array([True, False, True]))
    for j in range(4):
        S = colex_subsets(10, j)
        assert len(S) == comb(10, j)
        assert index.rank(S).tolist() == list(range(len(S)))
        assert len({tuple(r) for r in S.tolist()}) == len(S)


def test_planted_three_pixel_rule_is_recovered(rng):
    X = rng.random((600, 64)) < 0.5
    a, b, c = 5, 22, 47
    y = (X[:, a] & ~X[:, b]) | (X[:, b] & X[:, c])  # a 2-way multiplexer: needs all three
    rule = LutRule(k=3).fit(X, y)
    assert rule.pixels_.tolist() == [a, b, c]
    assert rule.train_errors_ == 0
    assert (rule.predict(X) == y).all()


def test_beam_search_finds_the_optimum_when_it_keeps_everything(rng):
    X = rng.random((300, 9)) < 0.5
    y = rng.random(300) < 0.4
    index = CountIndex(X, y)
    start, _, _ = exhaustive_best(index, 2, keep=comb(9, 2))
    beam, errs, scored = beam_best(index, start, 4, width=comb(9, 4))
    combos, ref = brute_errors(X, y, 4)
    order = np.argsort(ref, kind="stable")
    assert beam.tolist() == combos[order].tolist() and errs.tolist() == ref[order].tolist()
    assert scored == comb(9, 3) + comb(9, 4)


def test_narrow_beam_scores_its_sets_right_and_never_beats_the_optimum(rng):
    X = rng.random((300, 12)) < 0.5
    y = (X[:, 1] & X[:, 7]) ^ (rng.random(300) < 0.25)
    index = CountIndex(X, y)
    start, _, _ = exhaustive_best(index, 1, keep=4)
    beam, errs, _ = beam_best(index, start, 3, width=4)
    combos, ref = brute_errors(X, y, 3)
    lookup = {tuple(c): e for c, e in zip(combos.tolist(), ref.tolist())}
    assert [lookup[tuple(b)] for b in beam.tolist()] == errs.tolist()
    assert (np.diff(errs) >= 0).all() and errs[0] >= ref.min()


def test_progress_reaches_the_total_and_cancel_stops(rng, monkeypatch):
    monkeypatch.setattr(engine, "CHUNK_WORDS", 64)
    X = rng.random((200, 20)) < 0.5
    y = rng.random(200) < 0.5
    seen = []
    exhaustive_best(CountIndex(X, y), 3, progress=lambda d, t: seen.append((d, t)))
    assert seen[-1] == (comb(20, 3), comb(20, 3))
    assert all(b[0] > a[0] for a, b in itertools.pairwise(seen))
    calls = []

    def cancel():
        calls.append(1)
        return len(calls) > 2

    with pytest.raises(SearchCancelled):
        exhaustive_best(CountIndex(X, y), 3, cancel=cancel)
    with pytest.raises(SearchCancelled):
        LutRule(k=3).fit(X, y, cancel=lambda: True)


def test_rule_falls_back_to_a_beam_that_reports_its_own_error_and_cancels(rng):
    X = rng.random((300, 30)) < 0.5
    y = (X[:, 4] & X[:, 11]) ^ (rng.random(300) < 0.15)
    rule = LutRule(k=3, exact_size=2, beam_width=8).fit(X, y)
    assert rule.search_ == "beam"
    assert rule.train_errors_ == int(np.minimum(rule.counts_[:, 0], rule.counts_[:, 1]).sum())
    stepped = []  # the rule reports progress only from the beam: cancel once it has stepped
    with pytest.raises(SearchCancelled):
        LutRule(k=4, exact_size=2, beam_width=8).fit(
            X, y, progress=lambda d, t: stepped.append(d), cancel=lambda: bool(stepped))
    assert stepped == [1]


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("k", [4, 5])
def test_four_and_five_pixel_optimum_equals_brute_force(seed, k):
    X, y = random_case(200 + seed, repeats=seed == 1)
    if X.shape[1] < k + 2:  # enough pixels for more than a handful of sets
        X = np.column_stack([X, np.random.default_rng(seed).random((len(X), k + 2 - X.shape[1])) < 0.5])
    combos, errs = brute_errors(X, y, k)
    first = int(np.argmin(errs))
    best, best_e, _ = exhaustive_best(CountIndex(X, y), k)
    assert best[0].tolist() == combos[first].tolist() and best_e[0] == errs[first]
    rule = LutRule(k=k).fit(X, y)  # the default plan: a search this small is exhaustive
    assert rule.search_ == "exhaustive" and rule.pixels_.tolist() == combos[first].tolist()


class _Clock:
    """A stand-in for time.thread_time that advances a fixed step per reading."""

    def __init__(self, step):
        self.now, self.step = 0.0, step

    def thread_time(self):
        self.now += self.step
        return self.now


def test_plan_follows_the_estimated_time_not_the_count(rng, monkeypatch):
    X = rng.random((300, 12)) < 0.5
    y = rng.random(300) < 0.4
    monkeypatch.setattr(engine, "time", _Clock(0.001))  # every timed span is 1 ms: a known rate
    plan = engine.plan_search(CountIndex(X, y), 4, max_seconds=1e9)
    assert plan.method == "exhaustive" and plan.largest_exact_size == 4 and plan.sets == comb(12, 4)
    # The estimate is the table time plus the sampled units' rate times every set; units are one
    # reading apart, so the rate is known from the units' sizes.
    est = plan.estimated_seconds
    assert est > 0
    tight = engine.plan_search(CountIndex(X, y), 4, max_seconds=est * 0.99)
    assert tight.method == "beam" and tight.estimated_seconds == pytest.approx(est)
    per_set = (est - 0.001) / comb(12, 4)  # tables took one 1 ms span
    assert tight.largest_exact_size == max(j for j in (1, 2, 3) if comb(12, j) * per_set <= est * 0.99)
    forced = engine.plan_search(CountIndex(X, y), 4, max_seconds=0.0, exhaustive=True)
    assert forced.method == "exhaustive" and forced.largest_exact_size == 4
    nothing = engine.plan_search(CountIndex(X, y), 4, max_seconds=0.0)
    assert nothing.method == "beam" and nothing.largest_exact_size == 1


def test_rule_records_its_plan_and_its_exact_size(rng):
    X = rng.random((300, 12)) < 0.5
    y = (X[:, 2] & X[:, 9]) ^ (rng.random(300) < 0.2)
    rule = LutRule(k=3, max_seconds=0.0).fit(X, y)
    assert rule.search_ == "beam" and rule.largest_exact_size_ == 1 and rule.plan_.method == "beam"
    exact = LutRule(k=3, max_seconds=0.0, exhaustive=True).fit(X, y)
    combos, errs = brute_errors(X, y, 3)
    assert exact.search_ == "exhaustive" and exact.pixels_.tolist() == combos[int(np.argmin(errs))].tolist()
    fixed = LutRule(k=3, exact_size=2).fit(X, y)
    assert fixed.plan_ is None and fixed.search_ == "beam" and fixed.largest_exact_size_ == 2


def test_a_lost_unit_is_an_error_never_a_smaller_search(rng, monkeypatch):
    X = rng.random((100, 10)) < 0.5
    y = rng.random(100) < 0.5
    real = engine.run_units

    def drop_last(*args, **kwargs):
        items = list(real(*args, **kwargs))
        yield from items[:-1]

    monkeypatch.setattr(engine, "run_units", drop_last)
    with pytest.raises(RuntimeError, match="scored"):
        exhaustive_best(CountIndex(X, y), 3)
