"""stream/literature.py: HitRate@P% and point adjustment against their papers' definitions, written
out naively here (Su et al., KDD 2019; Xu et al., WWW 2018), on hand examples and random inputs."""

import doctest
import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

import shiftsieve.stream.literature as literature
from shiftsieve.stream.literature import covered, hit_rate, point_adjust


def test_docstring_examples():
    result = doctest.testmod(literature)
    assert result.attempted > 0 and result.failed == 0


def test_hit_rate_hand_examples():
    # Su et al. 2019: HitRate@P% = Hit@floor(P% x |GT|) / |GT|. |GT| = 3: the top 3 at 100 %, the top
    # floor(4.5) = 4 at 150 %.
    ranking = ["m3", "m1", "m7", "m2", "m5"]
    assert hit_rate(ranking, ["m1", "m2", "m4"], 100) == 1 / 3
    assert hit_rate(ranking, ["m1", "m2", "m4"], 150) == 2 / 3
    assert hit_rate(["m1"], ["m1", "m2", "m4"], 150) == 1 / 3     # a short ranking: what it names
    assert hit_rate([], ["m1"], 100) == 0.0


def _naive_point_adjust(alerted, labelled):
    """Xu et al. 2018 (Donut), the adjustment of its evaluation: for each contiguous labelled segment, if any point in it is
    alerted, every point in it is alerted; other points unchanged."""
    out = list(alerted)
    i = 0
    while i < len(labelled):
        if labelled[i]:
            j = i
            while j < len(labelled) and labelled[j]:
                j += 1
            if any(alerted[i:j]):
                out[i:j] = [True] * (j - i)
            i = j
        else:
            i += 1
    return out


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.booleans()), max_size=40))
def test_point_adjust_matches_the_definition(pairs):
    alerted = [a for a, _ in pairs]
    labelled = [b for _, b in pairs]
    got = point_adjust(np.array(alerted, dtype=bool), np.array(labelled, dtype=bool)).tolist()
    assert got == _naive_point_adjust(alerted, labelled)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 30), min_size=1, max_size=20, unique=True),
       st.lists(st.tuples(st.integers(-5, 35), st.integers(0, 10)), max_size=5))
def test_covered_matches_interval_membership(times, spans):
    ts = np.array(sorted(times), dtype=float)
    intervals = [(float(lo), float(lo + width)) for lo, width in spans]
    want = [any(lo <= t <= hi for lo, hi in intervals) for t in ts]
    assert covered(ts, intervals).tolist() == want
    assert covered(ts, [(1.0, math.inf)]).tolist() == [t >= 1.0 for t in ts]
