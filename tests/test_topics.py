"""Topic filters and stream templates (limitwatch.ingest.topics).

Filter rules and the worked examples below are those of OASIS *MQTT Version 3.1.1* (2014),
section 4.7 "Topic Names and Topic Filters" (examples quoted from memory of the standard's
text; MQTT 5.0 section 4.7 keeps them). The matcher is also compared with paho-mqtt's own
``topic_matches_sub``, an independent implementation, on generated filters and topics.
"""

from __future__ import annotations

import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from paho.mqtt.client import topic_matches_sub

from limitwatch.ingest.topics import (
    StreamTemplateError,
    TopicFilterError,
    TopicMapper,
    filters_overlap,
    topic_matches,
    validate_filter,
    validate_topic_name,
)
from tests.helpers import examples

# -- MQTT 3.1.1 section 4.7: which filters are valid -------------------------------------------


@pytest.mark.parametrize(
    "topic_filter",
    [
        "sport/tennis/player1/#",  # 4.7.1.2
        "sport/#",  # 4.7.1.2
        "#",  # 4.7.1.2: '#' on its own is valid
        "+",  # 4.7.1.3: '+' on its own is valid
        "+/tennis/#",  # 4.7.1.3
        "sport/+/player1",  # 4.7.1.3
        "/",  # 4.7.3: a filter of only '/' is valid
        "/finance",  # 4.7.3: a leading '/' makes a distinct filter
        "sport/ tennis",  # 4.7.3: spaces are allowed
    ],
)
def test_valid_filters_from_the_standard(topic_filter):
    validate_filter(topic_filter)


@pytest.mark.parametrize(
    ("topic_filter", "section"),
    [
        ("sport/tennis#", "4.7.1.2"),  # '#' must follow a level separator
        ("sport/tennis/#/ranking", "4.7.1.2"),  # '#' must be the last character
        ("#/x", "4.7.1.2"),
        ("sport+", "4.7.1.3"),  # '+' must occupy an entire level
        ("sport/+tennis", "4.7.1.3"),
        ("", "4.7.3"),  # at least one character
        ("a/\x00/b", "4.7.3"),  # no U+0000
        ("a" * 65536, "4.7.3"),  # at most 65535 bytes
    ],
)
def test_invalid_filters_name_the_section_they_break(topic_filter, section):
    with pytest.raises(TopicFilterError, match=re.escape(f"MQTT 3.1.1 section {section}")):
        validate_filter(topic_filter)


def test_shared_subscriptions_are_refused_with_the_reason():
    # MQTT 5.0 section 4.8.2: "$share/{ShareName}/{filter}" spreads messages over a group.
    with pytest.raises(TopicFilterError, match="order"):
        validate_filter("$share/lw/quillmoor/#")


def test_topic_names_for_publishing_take_no_wildcards():
    validate_topic_name("limitwatch/lw-1/status")
    for bad in ("limitwatch/+/status", "limitwatch/#", ""):
        with pytest.raises(TopicFilterError):
            validate_topic_name(bad)


# -- MQTT 3.1.1 section 4.7: which topics a filter matches --------------------------------------


@pytest.mark.parametrize(
    ("topic_filter", "topic", "expected"),
    [
        # 4.7.1.2 multi-level wildcard
        ("sport/tennis/player1/#", "sport/tennis/player1", True),
        ("sport/tennis/player1/#", "sport/tennis/player1/ranking", True),
        ("sport/tennis/player1/#", "sport/tennis/player1/score/wimbledon", True),
        ("sport/#", "sport", True),
        # 4.7.1.3 single-level wildcard
        ("sport/tennis/+", "sport/tennis/player1", True),
        ("sport/tennis/+", "sport/tennis/player2", True),
        ("sport/tennis/+", "sport/tennis/player1/ranking", False),
        ("sport/+", "sport", False),
        ("sport/+", "sport/", True),
        ("+/+", "/finance", True),
        ("/+", "/finance", True),
        ("+", "/finance", False),
        # 4.7.2 topics beginning with $
        ("#", "$SYS/broker/clients", False),
        ("+/monitor/Clients", "$SYS/monitor/Clients", False),
        ("$SYS/#", "$SYS/monitor/Clients", True),
        ("$SYS/monitor/+", "$SYS/monitor/Clients", True),
        # 4.7.3 case sensitive
        ("ACCOUNTS", "Accounts", False),
    ],
)
def test_matching_follows_the_standards_examples(topic_filter, topic, expected):
    assert topic_matches(topic_filter, topic) is expected
    assert TopicMapper(topic_filter, "{topic}").matches(topic) is expected


_level = st.sampled_from(["a", "b", "pack-1", "", "$SYS", "x y"])
_topics = st.lists(_level, min_size=1, max_size=5).map("/".join)
_filters = st.builds(
    lambda levels, tail: "/".join([*levels, *tail]),
    st.lists(st.one_of(_level, st.just("+")), min_size=0, max_size=4),
    st.sampled_from([[], ["#"]]),
).filter(lambda f: f != "")


@settings(max_examples=examples(400), deadline=None)
@given(_filters, _topics)
def test_matching_agrees_with_paho_topic_matches_sub(topic_filter, topic):
    assert topic_matches(topic_filter, topic) == topic_matches_sub(topic_filter, topic)


@settings(max_examples=examples(300), deadline=None)
@given(_filters, _filters, st.lists(_topics, min_size=1, max_size=30))
def test_overlap_is_never_denied_when_a_topic_matches_both(a, b, topics):
    # Soundness against a brute-force search: if some topic matches both filters, the filters
    # overlap. (Completeness is checked by the hand-picked cases below.)
    if any(topic_matches_sub(a, t) and topic_matches_sub(b, t) for t in topics):
        assert filters_overlap(a, b)


@pytest.mark.parametrize(
    ("a", "b", "expected"),
    [
        ("plant/+/temp", "plant/oven/#", True),
        ("plant/+/temp", "plant/oven/temp", True),
        ("plant/+/temp", "plant/+/energy", False),
        ("plant/#", "plant", True),  # '#' also matches the parent level
        ("a/+", "a", False),
        ("#", "$SYS/x", False),  # 4.7.2
        ("$SYS/#", "$SYS/x", True),
    ],
)
def test_overlap_cases(a, b, expected):
    assert filters_overlap(a, b) is expected
    assert filters_overlap(b, a) is expected


# -- stream templates ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("topic_filter", "template", "topic", "stream"),
    [
        (
            "quillmoor/+/+/reading",
            "{2}/{3}",
            "quillmoor/pack-1/downtime/reading",
            "pack-1/downtime",
        ),
        ("quillmoor/+/+/reading", "{3}@{2}", "quillmoor/comp-a/temp/reading", "temp@comp-a"),
        ("site/#", "{#}", "site/oven-1/energy", "oven-1/energy"),
        ("site/#", "a/{1}/{#}", "site/x", "a/site/x"),
        ("gw/oven-1/energy", "oven-1/energy", "gw/oven-1/energy", "oven-1/energy"),
        ("gw/+", "{topic}", "gw/x", "gw/x"),
        ("gw/+", "{{{2}}}", "gw/x", "{x}"),
        ("gw/+", "{ 2 }", "gw/x", "x"),
    ],
)
def test_templates_build_stream_ids(topic_filter, template, topic, stream):
    assert TopicMapper(topic_filter, template).stream_for(topic) == stream


def test_unmatched_topics_and_an_empty_remainder_give_no_stream():
    mapper = TopicMapper("site/+/energy", "{2}")
    assert mapper.stream_for("site/oven-1/temp") is None
    assert mapper.stream_for("site/oven-1/energy/extra") is None
    multi = TopicMapper("site/#", "{#}")
    assert multi.matches("site")  # 4.7.1.2: '#' includes the parent level ...
    assert multi.stream_for("site") is None  # ... which leaves nothing to name a stream by
    assert TopicMapper("+", "{1}").stream_for("") is None  # an empty level, an empty id


@pytest.mark.parametrize(
    ("topic_filter", "template", "complaint"),
    [
        ("a/+", "{3}", "past the levels"),
        ("a/+/#", "{3}", "use {#}"),
        ("a/+", "{0}", "count from 1"),
        ("a/+", "{#}", "ending in '#'"),
        ("a/+", "{level}", "unknown placeholder"),
        ("a/+", "{2", "unmatched"),
        ("a/+", "x}", "unmatched"),
        ("a/+", "  ", "empty"),
    ],
)
def test_bad_templates_say_what_is_wrong(topic_filter, template, complaint):
    with pytest.raises(StreamTemplateError, match=complaint):
        TopicMapper(topic_filter, template)


def test_a_bad_filter_is_refused_by_the_mapper_too():
    with pytest.raises(TopicFilterError, match=r"4\.7\.1\.3"):
        TopicMapper("a/b+", "{1}")
