"""The batch's lookup of the readings it applied (for naming a refusal ``duplicate``) answers
exactly as the plain scan of the batch it replaced, while the batch grows between questions."""

from __future__ import annotations

from hypothesis import given
from hypothesis import strategies as st

from limitwatch.model import Outcome, Reading
from limitwatch.pipeline import BatchResult
from limitwatch.pipeline.refusals import AppliedReadings

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z


def scanned(outcomes: list[Outcome], reading: Reading) -> bool:
    """The plain rule, written out: the same stream, and the same time and value or the same
    sequence number, as any reading applied so far."""
    return any(
        o.reading.stream == reading.stream
        and (
            (o.reading.time == reading.time and o.reading.value == reading.value)
            or (o.reading.seq is not None and o.reading.seq == reading.seq)
        )
        for o in outcomes
    )


readings = st.builds(
    Reading,
    st.sampled_from(["a", "b"]),
    st.sampled_from([T0, T0 + 1, T0 + 2]),
    st.sampled_from([0.0, -0.0, 1.0, 2.5]),
    st.one_of(st.none(), st.integers(0, 3)),
)
steps = st.lists(st.tuples(st.booleans(), readings), max_size=40)


@given(steps)
def test_the_lookup_answers_as_a_scan_while_the_batch_grows(script):
    """True in a step appends the reading's outcome to the batch; False asks about it."""
    batch = BatchResult()
    for append, reading in script:
        if append:
            batch.outcomes.append(Outcome(reading, True))
        else:
            assert (reading in batch.applied) == scanned(batch.outcomes, reading)


def test_the_lookup_adds_only_the_outcomes_appended_since_the_last_question():
    outcomes = [Outcome(Reading("a", T0 + n, 1.0, n), True) for n in range(1000)]
    applied = AppliedReadings(outcomes)
    assert Reading("a", T0 + 5, 9.0, 5) in applied  # same sequence number
    assert Reading("a", T0 + 5, 1.0) in applied  # same time and value
    assert Reading("a", T0 + 5, 2.0) not in applied
    assert Reading("b", T0 + 5, 1.0, 5) not in applied  # another stream
    outcomes.append(Outcome(Reading("a", T0 + 2000, 3.0), True))
    assert Reading("a", T0 + 2000, 3.0) in applied
    assert applied._seen == len(outcomes)  # the index was extended, not rebuilt
    assert len(applied._keys) == 2 * 1000 + 1
