import json

import numpy as np
import pytest

from analysis.errors import TraceError
from analysis.signature import (
    Signature,
    SignatureSet,
    signature_from_frequencies,
    signature_of,
    similarities,
    similarity,
    similarity_many,
)
from analysis.types import Family, Peak

MHZ = 1e6


def sig(frequencies_mhz, fundamentals_mhz=()):
    f = np.asarray(frequencies_mhz, dtype=float) * MHZ
    return Signature(
        frequency_hz=f,
        level=np.full(f.size, 40.0),
        fundamentals_hz=np.asarray(fundamentals_mhz, dtype=float) * MHZ,
    )


# A past case with unrelated peaks around the ones under test (invented).
UNRELATED_MHZ = [33.3, 57.1, 81.7, 111.9, 133.7, 170.3, 203.9, 250.1, 301.7]


def test_a_family_match_outranks_a_single_common_frequency():
    query = signature_from_frequencies(np.array([48, 96, 144, 192]) * MHZ)
    family_case = sig(sorted([48, 96, 144.2, 192] + UNRELATED_MHZ), [48])
    one_line_case = sig(sorted([96] + UNRELATED_MHZ))
    tiny_case = sig([96])
    family = similarity(query, family_case).score
    one_line = similarity(query, one_line_case).score
    tiny = similarity(query, tiny_case).score
    # Documented score: 0.75·(query coverage) + 0.25·(other coverage / max(K, M)).
    assert family > 0.75
    assert one_line < 0.25 and tiny < 0.3
    assert family - max(one_line, tiny) > 0.5


def test_identical_signatures_score_one_and_disjoint_ones_zero():
    a = sig([25, 75, 125], [25])
    assert similarity(a, a).score == pytest.approx(1.0)
    assert similarity(a, sig([33.3, 57.1])).score == 0.0


@pytest.mark.parametrize(("other_mhz", "matches"), [(100.4, True), (99.6, True), (100.6, False)])
def test_drift_within_the_tolerance_matches_and_outside_does_not(other_mhz, matches):
    # rel_tol 0.5 % of 100 MHz = 500 kHz (worked example).
    score = similarity(sig([100]), sig([other_mhz]), rel_tol=0.005).score
    assert (score > 0) is matches
    if matches:
        # An edge-of-tolerance match earns less than an exact one.
        assert score < similarity(sig([100]), sig([100])).score


def test_an_absolute_tolerance_widens_narrow_relative_ones():
    # Conducted scans: 1 kHz of drift at 150 kHz is 0.67 % (worked example).
    assert similarity(sig([0.150]), sig([0.151])).score == 0.0
    assert similarity(sig([0.150]), sig([0.151]), abs_tol_hz=2e3).score > 0


def test_different_orders_of_the_same_fundamental_score_high():
    # Orders 1, 3, 5 of a 25 MHz clock against orders 7, 9, 11 of it.
    query = sig([25, 75, 125], [25])
    other = sig([175, 225, 275], [25])
    result = similarity(query, other)
    assert result.score >= 0.6
    assert result.shared_fundamentals_hz == (25 * MHZ,)
    assert {m.order for m in result.matches} == {1, 3, 5}
    # Without the family on the other side nothing is shared.
    assert similarity(query, sig([175, 225, 275])).score == 0.0
    # And it beats a single coincident line among unrelated ones.
    assert result.score > similarity(query, sig(sorted([75] + UNRELATED_MHZ))).score


def test_a_family_drifted_beyond_the_tolerance_is_not_shared():
    query = sig([25, 75, 125], [25])
    within = similarity(query, sig([175.7, 225.9, 276.1], [25.1]))  # 0.4 % off
    beyond = similarity(query, sig([176.4, 226.8, 277.2], [25.2]))  # 0.8 % off
    assert within.score > 0.3 and within.shared_fundamentals_hz == (25 * MHZ,)
    assert beyond.score == 0.0 and beyond.shared_fundamentals_hz == ()


def test_the_score_is_symmetric_for_one_to_one_matches_and_favours_the_explained_query():
    # Documented: equal sizes and one-to-one direct matches give the same
    # score both ways (here every family credit is below the direct one).
    a = sig([48, 96, 144, 300], [48])
    b = sig([48, 96.3, 144.5, 400], [48.1])
    assert similarity(a, b).score == pytest.approx(similarity(b, a).score)
    # A query wholly contained in a larger case scores higher than the reverse.
    small = sig([48, 96, 144])
    large = sig([48, 96, 144, 300, 400, 500])
    assert similarity(small, large).score == pytest.approx(0.75 + 0.25 * 3 / 6)
    assert similarity(large, small).score == pytest.approx(0.75 * 3 / 6 + 0.25 * 3 / 6)


def test_the_explanation_names_the_family_and_the_matched_frequencies():
    query = sig([48, 96, 144], [48])
    other = sig([48, 96, 144.2, 250.1], [48])
    text = similarity(query, other).explanation
    assert "same 48 MHz family: orders 1, 2, 3 match" in text
    # |144 − 144.2| / 144.2 = 0.139 % (worked example).
    assert "144 MHz matched 144.2 MHz within 0.14 %" in text
    assert similarity(query, sig([33.3])).explanation == "no frequency or family in common"
    orders_text = similarity(sig([25, 75, 125], [25]), sig([175, 225], [25])).explanation
    assert "orders 1, 3, 5 here, orders 7, 9 there" in orders_text


def test_similarity_many_agrees_with_similarity():
    rng = np.random.default_rng(7)
    query = sig([25, 48, 75, 96, 125, 144], [25, 48])
    candidates = [
        sig(
            np.sort(rng.uniform(20, 400, rng.integers(0, 12))),
            rng.choice([25, 48, 16, 33.3], rng.integers(0, 3), replace=False),
        )
        for _ in range(60)
    ] + [query, sig([])]
    scores = similarity_many(query, candidates)
    expected = [similarity(query, c).score for c in candidates]  # reference: one by one
    np.testing.assert_allclose(scores, expected, rtol=1e-12, atol=1e-12)
    assert scores[-2] == pytest.approx(1.0) and scores[-1] == 0.0
    assert similarity_many(query, []).shape == (0,)


def test_similarities_explain_each_candidate_as_similarity_does():
    query = sig([25, 75, 125, 175, 48.1], [25])
    others = [sig([175, 225, 275], [25]), sig([48, 300]), sig([]), query, sig(UNRELATED_MHZ, [33.3])]
    together = similarities(query, others)
    alone = [similarity(query, o) for o in others]  # reference: one comparison per candidate
    assert [(t.score, t.matches, t.shared_fundamentals_hz, t.explanation) for t in together] == [
        (a.score, a.matches, a.shared_fundamentals_hz, a.explanation) for a in alone]
    assert "same 25 MHz family" in together[0].explanation
    assert similarities(query, []) == []


def test_a_signature_set_from_table_rows_scores_as_the_signatures_do():
    rng = np.random.default_rng(11)
    query = sig([25, 48, 75, 96, 125, 144], [25, 48])
    candidates = [
        sig(
            np.sort(rng.uniform(20, 400, rng.integers(0, 12))),
            np.sort(rng.choice([25, 48, 16, 33.3], rng.integers(0, 3), replace=False)),
        )
        for _ in range(40)
    ]
    # Rows as a table holds them: per signature its peaks, then its fundamentals.
    group = np.concatenate([np.full(c.frequency_hz.size + c.fundamentals_hz.size, i)
                            for i, c in enumerate(candidates)])
    value = np.concatenate([np.r_[c.frequency_hz, c.fundamentals_hz] for c in candidates])
    is_fundamental = np.concatenate([np.r_[np.zeros(c.frequency_hz.size, bool), np.ones(c.fundamentals_hz.size, bool)]
                                     for c in candidates])
    rows = SignatureSet.from_rows(group, value, is_fundamental)
    assert len(rows) == len(candidates)
    # Reference: the list form, already checked against one-by-one similarity() above.
    np.testing.assert_array_equal(similarity_many(query, rows), similarity_many(query, candidates))
    back = rows.signature(7)
    np.testing.assert_array_equal(back.frequency_hz, candidates[7].frequency_hz)
    np.testing.assert_array_equal(back.fundamentals_hz, candidates[7].fundamentals_hz)


@pytest.mark.parametrize(
    "group, value",
    [([0, 2], [1e6, 2e6]), ([1, 1], [1e6, 2e6]), ([0, 1, 0], [1e6, 2e6, 3e6]), ([0, 0], [1e6, -2e6]), ([0], [1e6, 2e6])],
)
def test_a_signature_set_refuses_malformed_rows(group, value):
    with pytest.raises(TraceError):
        SignatureSet.from_rows(group, value, np.zeros(len(value), bool))


def test_to_dict_and_from_dict_round_trip_through_json():
    original = Signature(
        frequency_hz=np.array([48e6, 96e6]),
        level=np.array([41.5, np.nan]),
        fundamentals_hz=np.array([48e6]),
    )
    data = json.loads(json.dumps(original.to_dict()))
    assert data["level"] == [41.5, None]
    back = Signature.from_dict(data)
    np.testing.assert_array_equal(back.frequency_hz, original.frequency_hz)
    np.testing.assert_array_equal(back.level, original.level)
    np.testing.assert_array_equal(back.fundamentals_hz, original.fundamentals_hz)


def test_a_malformed_signature_raises_a_trace_error():
    with pytest.raises(TraceError, match="missing"):
        Signature.from_dict({"frequency_hz": [1.0]})
    with pytest.raises(TraceError, match="levels"):
        Signature.from_dict({"frequency_hz": [1.0, 2.0], "level": [1.0], "fundamentals_hz": []})
    with pytest.raises(TraceError, match="positive"):
        Signature.from_dict({"frequency_hz": [-5.0], "level": [1.0], "fundamentals_hz": []})
    with pytest.raises(TraceError):
        Signature.from_dict({"frequency_hz": ["abc"], "level": [1.0], "fundamentals_hz": []})


def test_signature_of_keeps_the_strongest_peaks_sorted_by_frequency():
    peaks = [
        Peak(300e6, 30.0, 3.0, 1e3),
        Peak(100e6, 50.0, 20.0, 1e3),
        Peak(200e6, 45.0, 15.0, 1e3),
        Peak(50e6, 35.0, 15.0, 1e3),
    ]
    families = [Family(50e6, (1, 2, 4), False, False), Family(25e6, (1, 3, 5), True, False)]
    s = signature_of(peaks, families, max_peaks=3)
    np.testing.assert_array_equal(s.frequency_hz, [50e6, 100e6, 200e6])
    np.testing.assert_array_equal(s.level, [35.0, 50.0, 45.0])
    np.testing.assert_array_equal(s.fundamentals_hz, [25e6, 50e6])


def test_typed_frequencies_find_a_family_from_three_but_not_from_two():
    three = signature_from_frequencies([96e6, 144e6, 192e6])
    np.testing.assert_allclose(three.fundamentals_hz, [48e6])
    assert np.isnan(three.level).all()
    assert signature_from_frequencies([96e6, 144e6]).fundamentals_hz.size == 0
    with pytest.raises(TraceError):
        signature_from_frequencies([96e6, 0.0])


def test_closeness_in_place_equals_its_plain_formula():
    # The in-place _closeness against the formula its docstring states, element by element:
    # 1 − (1 − edge)·d/t inside the tolerance, 0 beyond it or for NaN, and within no
    # tolerance (t = 0 or NaN) 1 for an exact match only.
    from analysis.signature import _EDGE_CREDIT, _closeness

    rng = np.random.default_rng(5)
    dev = np.abs(rng.normal(0, 1, (40, 12, 9)))
    dev[rng.random(dev.shape) < 0.1] = np.nan
    dev[rng.random(dev.shape) < 0.1] = 0.0
    tol = np.abs(rng.normal(0, 1, (40, 1, 9)))
    tol[rng.random(tol.shape) < 0.2] = 0.0
    tol[rng.random(tol.shape) < 0.1] = np.nan
    d, t = np.broadcast_arrays(dev, tol)
    expected = np.zeros(d.shape)
    for index in np.ndindex(d.shape):
        if not t[index] > 0:
            expected[index] = 1.0 if d[index] == 0 else 0.0
        elif d[index] <= t[index]:
            expected[index] = 1.0 - (1.0 - _EDGE_CREDIT) * (d[index] / t[index])
    assert np.array_equal(_closeness(dev, tol), expected)
    assert 0 < np.count_nonzero((expected > 0) & (expected < 1))  # the inside branch is exercised
