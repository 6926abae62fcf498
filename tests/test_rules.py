"""Run tests, EWMA and CUSUM: incremental detectors against plain batch recomputation.

Every detector known to the registry is found by introspection and checked at every prefix of
hypothesis-drawn streams against an oracle written here from the rule's textbook wording
(Western Electric handbook 1956; Nelson 1984; Roberts 1959; Page 1954), re-scanning the whole
prefix each time and applying the documented start-up and restart conventions.
"""

from __future__ import annotations

import inspect
import itertools
import json
import math
import pickle
import random
import re

import pytest
import scipy.stats
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from limitwatch.stats import rules
from limitwatch.stats.rules import (
    DETECTORS,
    PRESETS,
    RULES,
    BeyondLimits,
    MrBeyondLimit,
    RuleSpec,
    RuleSpecError,
    RunOneSide,
    UnknownRuleError,
    build_detectors,
    detector_from_state,
    parse_rules,
)
from limitwatch.stats.signal import Detector, Signal
from limitwatch.stats.smoothing import SMOOTHERS
from tests.helpers import examples

PROPERTY = settings(
    derandomize=True,
    max_examples=examples(60),
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)

# --------------------------------------------------------------------------------------------
# Oracles: does the pattern end at reading t, looking only at readings start..t?
# Each returns (side, involved, statistic, limit) or None. Defaults are the brief's numbers,
# typed here on purpose so a drifting default in the code is caught.
# --------------------------------------------------------------------------------------------

DEFAULTS = {
    "beyond-limits": {"k": 3.0},
    "two-of-three-zone-a": {"count": 2, "window": 3, "boundary": 2.0},
    "four-of-five-zone-b": {"count": 4, "window": 5, "boundary": 1.0},
    "run-one-side": {"length": 8},
    "trend": {"length": 6},
    "alternating": {"length": 14},
    "hugging-center": {"length": 15, "boundary": 1.0},
    "avoiding-center": {"length": 8, "boundary": 1.0},
    # d2 + 3 d3 for ranges of two: 2/sqrt(pi) + 3 sqrt(2 - 4/pi)
    "mr-beyond-limit": {"limit": 2 / math.sqrt(math.pi) + 3 * math.sqrt(2 - 4 / math.pi)},
    "ewma": {"lam": 0.2, "L": 2.962, "exact_startup": True},
    "cusum": {"k": 0.5, "h": 5.0, "headstart": 0.0},
}


def sign(a: float) -> int:
    return (a > 0) - (a < 0)


def beyond_limits(v, start, t, p):
    if v[t] > p["k"]:
        return "upper", (t,), v[t], p["k"]
    if v[t] < -p["k"]:
        return "lower", (t,), v[t], -p["k"]
    return None


def count_in_window(v, start, t, p):
    window = range(max(start, t - p["window"] + 1), t + 1)
    for side, factor in (("upper", 1), ("lower", -1)):
        hits = [i for i in window if factor * v[i] > p["boundary"]]
        if len(hits) >= p["count"]:
            return side, tuple(range(hits[0], t + 1)), None, None
    return None


def last_readings(v, start, t, n):
    """The n readings ending at t, or None when fewer than n arrived since the restart."""
    return v[t - n + 1 : t + 1] if t - n + 1 >= start else None


def run_one_side(v, start, t, p):
    seg = last_readings(v, start, t, p["length"])
    if seg is None:
        return None
    involved = tuple(range(t - p["length"] + 1, t + 1))
    if all(z > 0 for z in seg):
        return "upper", involved, None, None
    if all(z < 0 for z in seg):
        return "lower", involved, None, None
    return None


def trend(v, start, t, p):
    seg = last_readings(v, start, t, p["length"])
    if seg is None:
        return None
    involved = tuple(range(t - p["length"] + 1, t + 1))
    if all(b > a for a, b in itertools.pairwise(seg)):
        return "upper", involved, None, None
    if all(b < a for a, b in itertools.pairwise(seg)):
        return "lower", involved, None, None
    return None


def alternating(v, start, t, p):
    seg = last_readings(v, start, t, p["length"])
    if seg is None:
        return None
    steps = [sign(b - a) if b != a else 0 for a, b in itertools.pairwise(seg)]
    if all(s != 0 for s in steps) and all(a == -b for a, b in itertools.pairwise(steps)):
        return "both", tuple(range(t - p["length"] + 1, t + 1)), None, None
    return None


def hugging_center(v, start, t, p):
    seg = last_readings(v, start, t, p["length"])
    if seg is not None and all(abs(z) < p["boundary"] for z in seg):
        return "both", tuple(range(t - p["length"] + 1, t + 1)), None, None
    return None


def avoiding_center(v, start, t, p):
    seg = last_readings(v, start, t, p["length"])
    if seg is not None and all(abs(z) > p["boundary"] for z in seg):
        return "both", tuple(range(t - p["length"] + 1, t + 1)), None, None
    return None


def mr_beyond_limit(v, start, t, p):
    if v[t] > p["limit"]:
        return "upper", ((t - 1, t) if t > 0 else (t,)), v[t], p["limit"]
    return None


def ewma(v, start, t, p):
    lam, L = p["lam"], p["L"]
    w = 0.0
    for z in v[start : t + 1]:
        w = lam * z + (1 - lam) * w
    n = t - start + 1
    if p["exact_startup"]:
        limit = L * math.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * n)))
    else:
        limit = L * math.sqrt(lam / (2 - lam))
    if abs(w) <= limit:
        return None
    span = 1  # fewest recent readings carrying 99% of the weight: 1 - (1 - lam)^span >= 0.99
    while (1 - lam) ** span > 0.01:
        span += 1
    involved = tuple(range(max(start, t - span + 1), t + 1))
    return ("upper", involved, w, limit) if w > 0 else ("lower", involved, w, -limit)


def cusum(v, start, t, p):
    for side, factor in (("upper", 1), ("lower", -1)):
        total, sums = p["headstart"], []
        for i in range(start, t + 1):
            total = max(0.0, total + factor * v[i] - p["k"])
            sums.append((i, total))
        if total > p["h"]:
            zeros = [i for i, s in sums if s == 0.0]
            first = zeros[-1] + 1 if zeros else start
            return side, tuple(range(first, t + 1)), total, p["h"]
    return None


ORACLES = {
    "beyond-limits": beyond_limits,
    "two-of-three-zone-a": count_in_window,
    "four-of-five-zone-b": count_in_window,
    "run-one-side": run_one_side,
    "trend": trend,
    "alternating": alternating,
    "hugging-center": hugging_center,
    "avoiding-center": avoiding_center,
    "mr-beyond-limit": mr_beyond_limit,
    "ewma": ewma,
    "cusum": cusum,
}

# Parameter sets per detector: the defaults plus short patterns, so that random streams
# complete every rule often.
VARIANTS = {
    "beyond-limits": [{}, {"k": 2.0}],
    "two-of-three-zone-a": [
        {},
        {"count": 3, "window": 3, "boundary": 1.0},
        {"count": 1, "window": 1},
    ],
    "four-of-five-zone-b": [
        {},
        {"count": 2, "window": 5},
        {"count": 3, "window": 4, "boundary": 0.5},
    ],
    "run-one-side": [{}, {"length": 9}, {"length": 2}, {"length": 3}],
    "trend": [{}, {"length": 2}, {"length": 3}],
    "alternating": [{}, {"length": 3}, {"length": 5}],
    "hugging-center": [{}, {"length": 3}, {"length": 2, "boundary": 0.5}],
    "avoiding-center": [{}, {"length": 2}, {"length": 3, "boundary": 2.0}],
    "mr-beyond-limit": [{}, {"limit": 1.0}],
    "ewma": [
        {},
        {"lam": 0.5, "L": 1.0},
        {"lam": 0.3, "L": 1.5, "exact_startup": False},
        {"lam": 1.0, "L": 2.0},
    ],
    "cusum": [
        {},
        {"h": 2.0},
        {"k": 0.0, "h": 1.5, "headstart": 0.75},
        {"k": 1.0, "h": 1.0, "headstart": 0.5},
    ],
}

CASES = [(rule, params) for rule in sorted(DETECTORS) for params in VARIANTS[rule]]
CASE_IDS = [f"{rule}-{i}" for rule in sorted(DETECTORS) for i in range(len(VARIANTS[rule]))]


def batch_signals(rule: str, params: dict, values: list[float]) -> list[Signal]:
    """Re-scan the whole stream; after a signal, look only at later readings."""
    p = {**DEFAULTS[rule], **params}
    chart = "mr" if rule == "mr-beyond-limit" else "x"
    found, start = [], 0
    for t in range(len(values)):
        hit = ORACLES[rule](values, start, t, p)
        if hit is not None:
            side, involved, statistic, limit = hit
            found.append(Signal(rule, chart, side, t, involved, statistic, limit))
            start = t + 1
    return found


def feed(det, values, first_index=0) -> list[Signal]:
    out = []
    for i, z in enumerate(values, start=first_index):
        s = det.update(i, z)
        if s is not None:
            out.append(s)
    return out


# Values on a half-sigma grid hit every zone boundary and tie; normals fill the gaps.
GRID = [i / 2 for i in range(-7, 8)]
z_values = st.one_of(
    st.sampled_from(GRID),
    st.floats(-4.0, 4.0, allow_nan=False),
    st.sampled_from([1e-300, -1e-300, 2.0000000000000004, -1.0000000000000002]),
)
z_streams = st.lists(z_values, max_size=50)


def stream_for(rule: str, values: list[float]) -> list[float]:
    return [abs(z) for z in values] if DETECTORS[rule].chart == "mr" else values


# --------------------------------------------------------------------------------------------
# Introspection
# --------------------------------------------------------------------------------------------


def test_registry_is_covered_by_oracles_and_ids_match_classes():
    assert set(DETECTORS) == set(RULES) | set(SMOOTHERS)
    assert set(ORACLES) == set(DETECTORS) == set(VARIANTS) == set(DEFAULTS)
    for rule_id, cls in DETECTORS.items():
        assert cls.rule == rule_id
        assert cls.chart == ("mr" if rule_id == "mr-beyond-limit" else "x")


@pytest.mark.parametrize("rule", sorted(DETECTORS))
def test_defaults_are_the_documented_ones(rule):
    params = DETECTORS[rule]().state()["params"]
    assert params == pytest.approx(DEFAULTS[rule])


@pytest.mark.parametrize("rule", sorted(DETECTORS))
def test_each_detector_is_small_documented_and_follows_the_protocol(rule):
    cls = DETECTORS[rule]
    det = cls()
    assert isinstance(det, Detector)
    assert not hasattr(det, "__dict__"), "detectors use __slots__"
    doc = inspect.getdoc(cls) or ""
    assert ">>>" in doc and "References" in doc


# --------------------------------------------------------------------------------------------
# Incremental == batch, state round trips, pickling, reset
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("rule", "params"), CASES, ids=CASE_IDS)
@PROPERTY
@given(values=z_streams)
def test_incremental_equals_batch_at_every_prefix(rule, params, values):
    values = stream_for(rule, values)
    det = DETECTORS[rule](**params)
    seen: list[Signal] = []
    for t, z in enumerate(values):
        s = det.update(t, z)
        if s is not None:
            seen.append(s)
        assert seen == batch_signals(rule, params, values[: t + 1])


@pytest.mark.parametrize(("rule", "params"), CASES, ids=CASE_IDS)
def test_seeded_long_streams_signal_and_agree_with_batch(rule, params):
    """Guards against a vacuous property test: long streams must actually produce signals."""

    rng = random.Random(20240611)
    values = []
    for _ in range(40):  # blocks of quiet, normal, wide and shifted behaviour
        scale, shift = rng.choice([0.3, 1.0, 2.0]), rng.choice([0.0, 0.0, 1.5, -1.5])
        for _ in range(40):
            z = rng.choice(GRID) / 2 if rng.random() < 0.5 else rng.gauss(0, 1)
            values.append(shift + scale * z)
    values = stream_for(rule, values)
    got = feed(DETECTORS[rule](**params), values)
    assert got == batch_signals(rule, params, values)
    assert len(got) >= 2


@pytest.mark.parametrize(("rule", "params"), CASES, ids=CASE_IDS)
@PROPERTY
@given(values=z_streams, cut=st.integers(0, 50))
def test_state_round_trip_in_the_middle_changes_nothing(rule, params, values, cut):
    """Property, for every detector in the registry: ``from_state(state())`` through JSON at
    any point, then continuing, gives exactly the signals of a detector that never stopped."""
    values = stream_for(rule, values)
    cut = min(cut, len(values))
    whole = feed(DETECTORS[rule](**params), values)
    first = DETECTORS[rule](**params)
    before = feed(first, values[:cut])
    data = json.loads(json.dumps(first.state(), allow_nan=False))
    restored = detector_from_state(data)
    assert type(restored) is DETECTORS[rule]
    assert restored.state() == first.state()
    assert DETECTORS[rule].from_state(data).state() == first.state()
    after = feed(restored, values[cut:], first_index=cut)
    assert before + after == whole


@pytest.mark.parametrize(("rule", "params"), CASES, ids=CASE_IDS)
@PROPERTY
@given(values=z_streams, cut=st.integers(0, 50))
def test_pickled_detector_continues_identically(rule, params, values, cut):
    values = stream_for(rule, values)
    cut = min(cut, len(values))
    whole = feed(DETECTORS[rule](**params), values)
    det = DETECTORS[rule](**params)
    before = feed(det, values[:cut])
    copy = pickle.loads(pickle.dumps(det))
    assert copy.state() == det.state()
    assert before + feed(copy, values[cut:], cut) == whole


@pytest.mark.parametrize(("rule", "params"), CASES, ids=CASE_IDS)
@PROPERTY
@given(values=z_streams, cut=st.integers(0, 50))
def test_reset_behaves_like_a_fresh_detector(rule, params, values, cut):
    values = stream_for(rule, values)
    cut = min(cut, len(values))
    det = DETECTORS[rule](**params)
    feed(det, values[:cut])
    det.reset()
    assert det.state() == DETECTORS[rule](**params).state()
    assert feed(det, values[cut:], 1000) == feed(DETECTORS[rule](**params), values[cut:], 1000)


# --------------------------------------------------------------------------------------------
# Refused input
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("rule", sorted(DETECTORS))
@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_values_are_refused_and_leave_state_alone(rule, bad):
    det = DETECTORS[rule]()
    feed(det, stream_for(rule, [0.5, 1.5, -0.3]))
    before = det.state()
    # One wording for every detector (run tests, EWMA, CUSUM): stats.signal.refuse_reading.
    with pytest.raises(ValueError, match=rf"^{re.escape(rule)}: reading 3 is not a finite number"):
        det.update(3, bad)
    assert det.state() == before
    assert det.update(3, 0.1) is None


@pytest.mark.parametrize("rule", sorted(r for r in DETECTORS if DETECTORS[r]().state()["state"]))
@pytest.mark.parametrize("index", [0, 1, 3])
def test_stateful_detectors_refuse_positions_out_of_sequence(rule, index):
    det = DETECTORS[rule]()
    det.update(1, 0.5)
    before = det.state()
    with pytest.raises(
        ValueError, match=rf"^{re.escape(rule)}: expected reading position 2, got {index}$"
    ):
        det.update(index, 0.5)
    assert det.state() == before
    det.update(2, 0.5)  # the right position is still accepted


def test_stateless_rules_accept_any_position():
    assert BeyondLimits().update(10, 0.0) is None
    det = MrBeyondLimit()
    assert det.update(7, 5.0).involved == (6, 7)
    assert det.update(3, 5.0).involved == (2, 3)  # a gap on the MR chart is fine
    assert det.update(0, 5.0).involved == (0,)


def test_negative_moving_range_is_refused():
    with pytest.raises(ValueError, match="negative"):
        MrBeyondLimit().update(1, -0.1)


# --------------------------------------------------------------------------------------------
# Boundaries and conventions, worked by hand from the rules' wording
# --------------------------------------------------------------------------------------------


def signals(rule: str, values: list[float], **params) -> list[Signal]:
    return feed(DETECTORS[rule](**params), values)


def test_exactly_three_sigma_is_not_beyond_the_limits():
    assert signals("beyond-limits", [3.0, -3.0, 2.999]) == []
    s = signals("beyond-limits", [0.0, math.nextafter(3.0, 4.0), -3.5])
    assert [(x.index, x.side, x.involved) for x in s] == [(1, "upper", (1,)), (2, "lower", (2,))]
    assert s[1].statistic == -3.5 and s[1].limit == -3.0


def test_zone_a_starts_strictly_above_two_sigma():
    assert signals("two-of-three-zone-a", [2.0, 2.0, 2.0, -2.0, -2.0]) == []
    s = signals("two-of-three-zone-a", [2.0, 2.5, 2.5])
    assert [(x.index, x.side, x.involved) for x in s] == [(2, "upper", (1, 2))]


def test_two_of_three_other_reading_may_be_anywhere_but_sides_do_not_mix():
    assert signals("two-of-three-zone-a", [2.5, -2.5, 2.5])[0].involved == (0, 1, 2)
    assert signals("two-of-three-zone-a", [2.5, -2.5, -0.1, 2.5]) == []
    assert signals("two-of-three-zone-a", [-2.1, 0.0, -3.5])[0].side == "lower"


def test_zone_b_starts_strictly_above_one_sigma():
    assert signals("four-of-five-zone-b", [1.0, 1.5, 1.5, 1.5, 1.0, 0.0, -1.0]) == []
    s = signals("four-of-five-zone-b", [1.5, 0.0, 1.1, 1.2, 3.5])
    assert [(x.index, x.side, x.involved) for x in s] == [(4, "upper", (0, 1, 2, 3, 4))]


def test_start_up_is_zero_state():
    # Champ & Woodall (1987): windows start empty, so two readings suffice for two-of-three.
    s = signals("two-of-three-zone-a", [2.5, 2.5])
    assert [(x.index, x.involved) for x in s] == [(1, (0, 1))]
    assert signals("four-of-five-zone-b", [-1.5] * 4)[0].involved == (0, 1, 2, 3)


def test_restart_forgets_the_readings_of_a_signal():
    s = signals("two-of-three-zone-a", [2.5, 2.5, 2.5, 2.5])
    assert [x.involved for x in s] == [(0, 1), (2, 3)]
    s = signals("run-one-side", [0.5] * 17)
    assert [x.index for x in s] == [7, 15]
    s = signals("trend", [float(i) for i in range(12)])
    assert [x.involved for x in s] == [tuple(range(6)), tuple(range(6, 12))]
    s = signals("hugging-center", [0.0] * 31)
    assert [x.index for x in s] == [14, 29]


def test_run_one_side_length_and_zero_breaks_the_run():
    assert signals("run-one-side", [0.3] * 7 + [0.0] + [0.3] * 7) == []
    assert signals("run-one-side", [-0.3] * 8)[0].side == "lower"
    assert signals("run-one-side", [0.3] * 8, length=9) == []
    assert signals("run-one-side", [0.3] * 9, length=9)[0].involved == tuple(range(9))
    assert signals("run-one-side", [0.3] * 4 + [-0.3] * 4) == []
    with pytest.raises(ValueError):
        RunOneSide(length=1)


def test_trend_ties_break_and_direction_sets_the_side():
    values = [0.0, 1.0, 2.0, 3.0, 4.0, 4.0, 5.0, 6.0, 7.0, 8.0]
    assert signals("trend", values) == []
    s = signals("trend", [*values, 9.0])
    assert [(x.index, x.side, x.involved) for x in s] == [(10, "upper", tuple(range(5, 11)))]
    s = signals("trend", [3.0, 2.5, 2.0, 1.0, -1.0, -2.5])
    assert s[0].side == "lower"
    assert signals("trend", [3.0, 2.5, 2.0, 2.0, -1.0, -2.5]) == []


def test_alternating_needs_fourteen_and_zero_differences_break_it():
    zigzag = [(-1.0) ** i * 0.5 for i in range(14)]
    s = signals("alternating", zigzag)
    assert [(x.index, x.side, x.involved) for x in s] == [(13, "both", tuple(range(14)))]
    assert signals("alternating", zigzag[:13]) == []
    flat = [*zigzag[:7], zigzag[6], *zigzag[7:]]  # one repeated value: a zero difference
    assert signals("alternating", flat) == []
    assert signals("alternating", [0.0, 1.0, 2.0, 1.0, 2.0, 1.0], length=4)[0].involved == (
        1,
        2,
        3,
        4,
    )


def test_hugging_and_avoiding_use_strict_one_sigma_boundaries():
    assert signals("hugging-center", [0.5] * 14 + [1.0] + [0.5] * 14) == []
    assert signals("hugging-center", [0.99, -0.99] * 8)[0].index == 14
    assert signals("avoiding-center", [1.5, -1.5, 1.0, 1.5, -1.5, 2.0, -3.0, 1.1, 1.2]) == []
    s = signals("avoiding-center", [1.5, -1.5] * 4)
    assert [(x.index, x.side, x.involved) for x in s] == [(7, "both", tuple(range(8)))]


def test_constant_stream_at_the_center_only_hugs_the_center():
    for rule in sorted(DETECTORS):
        got = signals(rule, [0.0] * 40)
        if rule == "hugging-center":
            assert [x.index for x in got] == [14, 29]
        else:
            assert got == [], rule


def test_mr_limit_is_d2_plus_three_d3_from_the_half_normal():
    # |X1 - X2| / sigma is half-normal with scale sqrt(2) (scipy.stats.halfnorm as reference).
    ref = scipy.stats.halfnorm(scale=math.sqrt(2))
    limit = ref.mean() + 3 * ref.std()
    assert MrBeyondLimit().limit == pytest.approx(limit, rel=1e-12)
    limit = MrBeyondLimit().limit
    assert signals("mr-beyond-limit", [0.0, limit, 3.6]) == []
    s = signals("mr-beyond-limit", [0.0, math.nextafter(limit, 5.0)])
    assert [(x.index, x.chart, x.side, x.involved) for x in s] == [(1, "mr", "upper", (0, 1))]


@pytest.mark.parametrize(
    ("rule", "params"),
    [
        ("beyond-limits", {"k": 0.0}),
        ("beyond-limits", {"k": math.nan}),
        ("two-of-three-zone-a", {"count": 4}),
        ("two-of-three-zone-a", {"window": 65, "count": 2}),
        ("four-of-five-zone-b", {"boundary": -1.0}),
        ("trend", {"length": 1}),
        ("trend", {"length": 2.5}),
        ("alternating", {"length": 2}),
        ("hugging-center", {"length": True}),
        ("mr-beyond-limit", {"limit": math.inf}),
    ],
)
def test_bad_parameters_are_refused(rule, params):
    with pytest.raises((ValueError, TypeError)):
        DETECTORS[rule](**params)


# --------------------------------------------------------------------------------------------
# Selection syntax, presets and the factory
# --------------------------------------------------------------------------------------------


def test_presets():
    ids = {name: [s.rule for s in parse_rules(name)] for name in PRESETS}
    assert ids["limits"] == ["beyond-limits", "mr-beyond-limit"]
    assert ids["western-electric"] == [
        "beyond-limits",
        "two-of-three-zone-a",
        "four-of-five-zone-b",
        "run-one-side",
        "mr-beyond-limit",
    ]
    assert sorted(ids["nelson"]) == sorted(RULES)
    nelson = {type(d).__name__: d for d in build_detectors(parse_rules("nelson"))}
    assert nelson["RunOneSide"].length == 9
    western = {type(d).__name__: d for d in build_detectors(parse_rules("western-electric"))}
    assert western["RunOneSide"].length == 8


def test_parse_ids_with_parameters_and_presets_mixed():
    specs = parse_rules(
        " western-electric , ewma(lam=0.1, L=2.814), cusum(h=4, headstart=2), trend "
    )
    assert [s.rule for s in specs][-3:] == ["ewma", "cusum", "trend"]
    dets = {d.rule: d for d in build_detectors(specs)}
    assert (dets["ewma"].lam, dets["ewma"].L, dets["ewma"].exact_startup) == (0.1, 2.814, True)
    assert (dets["cusum"].h, dets["cusum"].headstart) == (4.0, 2.0)
    assert parse_rules("ewma(exact_startup=false)")[0].build().exact_startup is False


def test_default_valued_parameters_normalise_away_and_text_round_trips():
    assert (
        parse_rules("run-one-side(length=8)")
        == parse_rules("run-one-side")
        == [RuleSpec("run-one-side")]
    )
    assert parse_rules("run-one-side, run-one-side()") == [RuleSpec("run-one-side")]
    for text in [
        *PRESETS,
        "ewma(lam=0.1, L=2.814), cusum(k=0.25, h=8.01)",
        "alternating(length=10)",
    ]:
        specs = parse_rules(text)
        assert parse_rules(", ".join(str(s) for s in specs)) == specs


def test_unknown_rule_error_lists_every_known_rule_and_preset():
    with pytest.raises(UnknownRuleError) as info:
        parse_rules("beyond-limits, wiggle")
    message = str(info.value)
    assert "'wiggle'" in message
    for name in [*DETECTORS, *PRESETS]:
        assert name in message


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("", "no rules"),
        ("  ", "no rules"),
        ("trend,", "ends with a comma"),
        (",trend", "cannot read"),
        ("trend trend", "cannot read"),
        ("trend(length=x)", "whole number"),
        ("trend(length=6.5)", "whole number"),
        ("trend(length=1)", "at least 2"),
        ("trend(size=6)", "no parameter 'size'"),
        ("trend(length=6, length=7)", "given twice"),
        ("trend(6)", "name=value"),
        ("ewma(lam=nan)", "finite"),
        ("ewma(exact_startup=maybe)", "true/false"),
        ("nelson(length=9)", "takes no parameters"),
        ("western-electric, run-one-side(length=9)", "twice with different parameters"),
    ],
)
def test_selection_errors_say_what_is_wrong(text, fragment):
    with pytest.raises(RuleSpecError) as info:
        parse_rules(text)
    assert fragment in str(info.value)


def test_factory_gives_fresh_unshared_detectors():
    specs = parse_rules("nelson, ewma, cusum")
    one, two = build_detectors(specs), build_detectors(specs)
    assert all(a is not b for a, b in zip(one, two, strict=True))
    for det in one:
        feed(det, stream_for(det.rule, [2.5, 2.6, 2.7, 2.8, 2.9, 1.1, 1.2, 1.3, 1.4]))
    untouched = [d.state() for d in build_detectors(specs)]
    assert [d.state() for d in two] == untouched
    assert sum(a.state() != b for a, b in zip(one, untouched, strict=True)) >= 8


def test_a_state_of_the_wrong_rule_or_keys_is_refused():
    data = RunOneSide().state()
    with pytest.raises(ValueError, match="run-one-side"):
        BeyondLimits.from_state(data)
    with pytest.raises(UnknownRuleError):
        detector_from_state({**data, "rule": "wiggle"})
    with pytest.raises(ValueError, match="state"):
        RunOneSide.from_state({**data, "state": {"run": 0}})


def test_public_names_exist():
    for name in rules.__all__:
        assert hasattr(rules, name)


def test_every_list_of_rule_ids_agrees_with_the_registry() -> None:
    from limitwatch.alerts.messages import RULE_WORDS
    from limitwatch.cli.shelves import RULE_IDS as SHELVABLE
    from limitwatch.config import KNOWN_RULES
    from limitwatch.stats.rules import DETECTORS, RULE_IDS

    assert set(RULE_IDS) == {*DETECTORS, "stale"} and len(RULE_IDS) == len(set(RULE_IDS))
    assert set(SHELVABLE) == set(RULE_IDS)
    assert set(KNOWN_RULES) == set(RULE_IDS)
    assert set(RULE_WORDS) == set(RULE_IDS)  # every rule is explained in the notices
