"""The engine's fused path against the reference detectors it stands in for.

``FusedRules`` runs every selected test in one call; the separate detectors of ``stats/rules.py``
and ``stats/smoothing.py`` are the reference (each is checked against a batch re-scan in
``test_rules.py``). Here the fused path must give exactly the reference's signals, in the same
order, and the same checkpoint state, at every prefix of hypothesis-drawn streams, across a
JSON state round trip (``state()`` then ``from_state``) at any point.
"""

from __future__ import annotations

import json
import math
import pickle

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from limitwatch.stats.fused import FUSED_RULES, FusedPlan, FusedRules
from limitwatch.stats.rules import DETECTORS, PRESETS, RuleSpec, parse_rules
from tests.test_rules import GRID, VARIANTS

PROPERTY = settings(
    derandomize=True,
    max_examples=300,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)


def spec(rule: str, params: dict) -> RuleSpec:
    return RuleSpec(rule, tuple(sorted(params.items())))


selections = st.lists(
    st.sampled_from(sorted(DETECTORS)).flatmap(
        lambda rule: st.sampled_from(VARIANTS[rule]).map(lambda p, rule=rule: spec(rule, p))
    ),
    min_size=1,
    max_size=len(DETECTORS),
    unique_by=lambda s: s.rule,
)
z_values = st.one_of(
    st.sampled_from(GRID),
    st.floats(-4.0, 4.0, allow_nan=False),
    st.sampled_from([0.0, -0.0, 1e-300, 2.0000000000000004, -1.0000000000000002]),
)
readings = st.lists(
    st.tuples(z_values, st.one_of(st.none(), st.floats(0.0, 5.0), st.sampled_from(GRID[7:]))),
    max_size=60,
)


class Reference:
    """The separate detectors, fed as the monitor fed them before the fused path."""

    def __init__(self, specs: list[RuleSpec]) -> None:
        built = [s.build() for s in specs]
        self.x = [d for d in built if d.chart == "x"]
        self.mr = [d for d in built if d.chart == "mr"]

    def update(self, index: int, z: float, mr: float | None) -> tuple:
        out = tuple(s for d in self.x if (s := d.update(index, z)) is not None)
        if mr is not None:
            out += tuple(s for d in self.mr if (s := d.update(index, mr)) is not None)
        return out

    def states(self) -> list:
        """Each detector's state values, in order: what the fused path's ``state()`` keeps."""
        return [list(d.state()["state"].values()) for d in (*self.x, *self.mr)]


@PROPERTY
@given(specs=selections, stream=readings, cut=st.integers(0, 60))
def test_fused_path_gives_the_reference_signals_in_order_at_every_prefix(specs, stream, cut):
    reference = Reference(specs)
    plan = FusedPlan(specs)
    fused = FusedRules(plan)
    assert fused.state()["states"] == reference.states()
    for index, (z, mr) in enumerate(stream):
        if index == cut:  # a checkpoint through JSON, then a new object continues
            saved = json.loads(json.dumps(fused.state()))
            fused = FusedRules.from_state(saved, plan, position=index - 1 if index else None)
        expected = reference.update(index, z, mr)
        assert fused.update(index, z, mr) == expected
        assert fused.state()["states"] == reference.states()


@pytest.mark.parametrize("preset", sorted(PRESETS))
def test_long_seeded_streams_agree_and_signal(preset):
    """Against a vacuous property test: every preset plus EWMA and CUSUM, on long streams of
    quiet, wide and shifted stretches, signals often and agrees throughout."""
    import random

    rng = random.Random(15)
    specs = parse_rules(f"{preset}, ewma, cusum")
    reference, fused = Reference(specs), FusedRules(FusedPlan(specs))
    seen, last = set(), None
    for index in range(20_000):
        if index % 50 == 0:
            scale, shift = rng.choice([0.3, 1.0, 2.0]), rng.choice([0.0, 0.0, 1.5, -1.5])
        x = shift + scale * rng.gauss(0.0, 1.0)
        mr = None if last is None or index % 97 == 0 else abs(x - last)
        last = x
        expected = reference.update(index, x, mr)
        assert fused.update(index, x, mr) == expected
        seen.update(s.rule for s in expected)
    assert seen == {s.rule for s in specs}
    assert fused.state()["states"] == reference.states()


def test_the_fused_path_runs_every_detector_there_is():
    # A rule added to the registry must be taught to FusedRules (and this set) too.
    assert set(DETECTORS) == FUSED_RULES
    FusedPlan([RuleSpec(rule) for rule in sorted(DETECTORS)])


def test_a_pickled_stream_continues_identically():
    specs = parse_rules("nelson, ewma, cusum")
    fused = FusedRules(FusedPlan(specs))
    for i in range(30):
        fused.update(i, 1.5 * math.sin(i), 0.4)
    copy = pickle.loads(pickle.dumps(fused))
    assert copy.state()["states"] == fused.state()["states"]
    assert [copy.update(30 + i, 2.5, 0.1) for i in range(5)] == [
        fused.update(30 + i, 2.5, 0.1) for i in range(5)
    ]


@pytest.mark.parametrize(("z", "mr"), [(math.nan, None), (math.inf, 0.1), (0.5, math.inf)])
def test_non_finite_input_is_refused_before_any_change(z, mr):
    fused = FusedRules(FusedPlan(parse_rules("nelson, ewma, cusum")))
    fused.update(0, 1.5, None)
    before = fused.state()["states"]
    with pytest.raises(ValueError, match="not finite"):
        fused.update(1, z, mr)
    assert fused.state()["states"] == before


def test_parameters_are_checked_once_with_the_detectors_messages():
    with pytest.raises(ValueError, match="window"):
        FusedPlan([RuleSpec("two-of-three-zone-a", (("count", 4),))])


def test_a_state_of_the_wrong_shape_is_refused():
    fused = FusedRules(FusedPlan(parse_rules("western-electric")))
    plan = fused.state()["rules"]
    with pytest.raises(ValueError, match="5 detector states"):
        FusedRules.from_state({"rules": plan, "states": [[]]}, fused._plan)
    with pytest.raises(ValueError, match="run-one-side: cannot use the saved state"):
        states = [[], [0, 0, None], [0, 0, None], [0], []]
        FusedRules.from_state({"rules": plan, "states": states}, fused._plan)


def test_a_state_saved_under_other_rules_starts_afresh():
    """Counts made under other rules or parameters mean nothing under these."""
    plan = FusedPlan(parse_rules("run-one-side"))
    fused = FusedRules(plan)
    for i in range(5):
        fused.update(i, 0.5, None)
    saved = fused.state()
    assert saved["rules"] == "run-one-side(length=8)"
    assert FusedRules.from_state(saved, plan).state() == saved
    other = FusedPlan(parse_rules("run-one-side(length=9)"))
    assert FusedRules.from_state(saved, other).state() == FusedRules(other).state()


@PROPERTY
@given(
    window=st.integers(1, 10),
    up=st.one_of(st.integers(-(2**11), 2**11), st.integers()),
    down=st.one_of(st.integers(-(2**11), 2**11), st.integers()),
)
def test_a_restored_window_is_placed_as_mask_by_mask_placement_places_it(window, up, down):
    """A restart places saved window masks through per-plan tables; every int a checkpoint
    may hold (negative, wider than the window, windows too long to list) must land exactly
    where placing its bits one by one puts them, and non-ints are still refused."""
    from limitwatch.stats.fused import _spread

    rule = "two-of-three-zone-a"
    plan = FusedPlan([spec(rule, {"count": 1, "window": window})])
    restored = FusedRules.from_state({"rules": plan.key, "states": [[up, down, 7]]}, plan)
    assert restored._win == _spread(up, 0, window) | _spread(down, 1, window)
    assert restored.state()["states"][0][2] == 7
    with pytest.raises(ValueError, match=f"{rule}: cannot use the saved state"):
        FusedRules.from_state({"rules": plan.key, "states": [[float(up), down, 7]]}, plan)
