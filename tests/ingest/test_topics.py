"""Topic layout: build and parse, segment validation, subscription filters (checked with paho-mqtt's own
topic matcher as the outside reference for MQTT 3.1.1 / 5.0 filter semantics), ACL text."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from paho.mqtt.client import topic_matches_sub

from shadow.errors import RejectedMessageError
from shadow.ingest.topics import (
    DEFAULT_PREFIX,
    MAX_TOPIC_LENGTH,
    RobotAddress,
    TopicKind,
    TopicLayout,
    check_sender,
    validate_segment,
)

SEGMENTS = st.from_regex(r"\A[A-Za-z0-9][A-Za-z0-9._-]{0,63}\Z")
ADDRESS = RobotAddress("plant-7", "cell-2", "delta-01")


def test_default_layout():
    layout = TopicLayout()
    assert layout.prefix == DEFAULT_PREFIX == "shadow"
    assert layout.samples_topic(ADDRESS) == "shadow/v1/plant-7/cell-2/delta-01/samples"
    assert layout.status_topic(ADDRESS) == "shadow/v1/plant-7/cell-2/delta-01/status"
    assert layout.publisher_topics(ADDRESS) == (layout.samples_topic(ADDRESS), layout.status_topic(ADDRESS))
    assert str(ADDRESS) == "plant-7/cell-2/delta-01"


@settings(max_examples=100, deadline=None)
@given(SEGMENTS, SEGMENTS, SEGMENTS, st.lists(SEGMENTS, min_size=1, max_size=4), st.sampled_from(TopicKind))
def test_build_parse_round_trip(site, cell, robot, prefix_levels, kind):
    layout = TopicLayout("/".join(prefix_levels))
    address = RobotAddress(site, cell, robot)
    topic = layout.topic(address, kind)
    assert len(topic) <= MAX_TOPIC_LENGTH
    assert layout.parse(topic) == (address, kind)
    # the service's filter for this kind matches the topic (paho's MQTT matcher as reference), the other kind's not
    assert topic_matches_sub(layout.subscription(kind), topic)
    other = TopicKind.STATUS if kind is TopicKind.SAMPLES else TopicKind.SAMPLES
    assert not topic_matches_sub(layout.subscription(other), topic)


def test_subscription_filters_narrow_by_site_cell_robot():
    layout = TopicLayout()
    topic = layout.samples_topic(ADDRESS)
    assert layout.subscription() == "shadow/v1/+/+/+/samples"
    assert layout.subscription(TopicKind.STATUS, cell="cell-2") == "shadow/v1/+/cell-2/+/status"
    assert topic_matches_sub(layout.subscription(site="plant-7"), topic)
    assert topic_matches_sub(layout.subscription(site="plant-7", cell="cell-2", robot="delta-01"), topic)
    assert not topic_matches_sub(layout.subscription(site="plant-8"), topic)
    assert not topic_matches_sub(layout.subscription(robot="delta-02"), topic)
    assert not topic_matches_sub(TopicLayout("other").subscription(), topic)
    with pytest.raises(RejectedMessageError, match=r"site: '\+' must be 1-64 of"):
        layout.subscription(site="+")


@pytest.mark.parametrize(
    "bad",
    [
        "",
        "+",
        "#",
        "a+b",
        "a#",
        "cell/2",
        "$SYS",
        " lead",
        "has space",
        "tab\t",
        "nul\x00",
        "caf\u00e9",
        "-x",
        ".x",
        "r" * 65,
    ],
)
def test_segments_reject_wildcards_separators_and_long_names(bad):
    with pytest.raises(RejectedMessageError, match="must be 1-64 of A-Z a-z 0-9 . _ - and start with a letter") as info:
        validate_segment("robot", bad)
    assert info.value.reason_code == "bad_topic"
    with pytest.raises(RejectedMessageError, match="robot: "):
        RobotAddress("plant-7", "cell-2", bad)


def test_segments_accept_the_allowed_alphabet():
    for good in ("a", "7", "A.b_c-d", "r" * 64, "v1"):
        assert validate_segment("site", good) == good
    with pytest.raises(RejectedMessageError, match="site: 7 must be"):
        validate_segment("site", 7)


def test_prefix_validation():
    assert TopicLayout("acme/plant7/shadow").samples_topic(ADDRESS).startswith("acme/plant7/shadow/v1/")
    for bad, match in (
        ("a/b/c/d/e", "prefix: 5 levels, expected 1 to 4"),
        ("", "prefix: '' must be"),
        ("a//b", "prefix: '' must be"),
        ("shadow/", "prefix: '' must be"),
        ("/shadow", "prefix: '' must be"),
        ("shadow/#", r"prefix: '#' must be"),
        ("$share/g", r"prefix: '\$share' must be"),
    ):
        with pytest.raises(RejectedMessageError, match=match):
            TopicLayout(bad)


@pytest.mark.parametrize(
    ("topic", "match", "code"),
    [
        ("other/v1/plant-7/cell-2/delta-01/samples", "is not <shadow>/v1/<site>/<cell>/<robot>/<kind>", "bad_topic"),
        ("shadow/v1/plant-7/cell-2/samples", "is not <shadow>/v1/", "bad_topic"),
        ("shadow/v1/plant-7/cell-2/delta-01/samples/extra", "is not <shadow>/v1/", "bad_topic"),
        ("shadow/v2/plant-7/cell-2/delta-01/samples", "topic: version level 'v2', this reader: 'v1'", "bad_version"),
        ("shadow/v1/plant-7/cell-2/delta-01/events", "last level 'events' is not 'samples' or 'status'", "bad_topic"),
        ("shadow/v1/plant 7/cell-2/delta-01/samples", "site: 'plant 7' must be", "bad_topic"),
        ("shadow/v1/plant-7//delta-01/samples", "cell: '' must be", "bad_topic"),
        ("shadow/v1/plant-7/cell-2/+/samples", r"robot: '\+' must be", "bad_topic"),
        ("shadow/v1/" + "x" * MAX_TOPIC_LENGTH, "characters, the limit is 512", "bad_topic"),
    ],
)
def test_parse_rejections(topic, match, code):
    with pytest.raises(RejectedMessageError, match=match) as info:
        TopicLayout().parse(topic)
    assert info.value.reason_code == code


def test_parse_rejects_non_strings():
    with pytest.raises(RejectedMessageError, match="topic: expected a string, got bytes"):
        TopicLayout().parse(b"shadow/v1/a/b/c/samples")  # type: ignore[arg-type]


def test_check_sender():
    check_sender(ADDRESS, "delta-01")
    with pytest.raises(
        RejectedMessageError, match="robot: message says 'delta-02' but was published on the topic of"
    ) as info:
        check_sender(ADDRESS, "delta-02")
    assert info.value.reason_code == "robot_mismatch"


def test_mosquitto_acl_gives_each_publisher_only_its_own_topics():
    layout = TopicLayout()
    other = RobotAddress("plant-7", "cell-3", "hexa-02")
    text = layout.mosquitto_acl({"ctl-delta-01": ADDRESS, "ctl-hexa-02": other}, service_user="shadow-service")
    lines = text.splitlines()
    assert lines[:2] == ["user shadow-service", "topic read shadow/v1/#"]
    block = lines[lines.index("user ctl-delta-01") + 1 : lines.index("user ctl-delta-01") + 3]
    assert block == [f"topic write {t}" for t in layout.publisher_topics(ADDRESS)]
    granted = [line.split(" ", 2)[2] for line in block]
    # with the MQTT filter semantics (paho's matcher), the grants reach this robot's topics and no other robot's
    assert any(topic_matches_sub(g, layout.samples_topic(ADDRESS)) for g in granted)
    assert not any(topic_matches_sub(g, layout.samples_topic(other)) for g in granted)
    with pytest.raises(RejectedMessageError, match="user: 'bad user' must be"):
        layout.mosquitto_acl({"bad user": ADDRESS}, service_user="shadow-service")
