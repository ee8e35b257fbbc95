"""Tests of sensor-id validation and topic templates."""

from __future__ import annotations

import re

import pytest
from hypothesis import given
from hypothesis import strategies as st

from trimtab.errors import ArgumentError, DecodeError
from trimtab.wire.topics import SENSOR_ID_PATTERN, TopicTemplate, validate_sensor_id

valid_ids = st.from_regex(SENSOR_ID_PATTERN, fullmatch=True).filter(lambda s: ".." not in s)


class TestValidateSensorId:
    @pytest.mark.parametrize("good", ["no2-07", "A", "pm2.5_site-3", "x" * 64, "0abc"])
    def test_accepts_plain_ids(self, good: str) -> None:
        """Ids of letters, digits, dot, underscore and hyphen up to 64 characters pass unchanged."""
        assert validate_sensor_id(good) == good

    @pytest.mark.parametrize(
        "bad",
        [
            "", "x" * 65, "a/b", "..", "a..b", ".hidden", "-x", "a+b", "a#", "a b",
            "a\x00b", "a\nb", "abc\n", "a\\b", "é", "a\u200bb", "+", "#",
        ],
    )  # fmt: skip
    def test_rejects_hostile_ids(self, bad: str) -> None:
        """Separators, '..', wildcards, control characters, non-ASCII and overlong ids fail."""
        with pytest.raises(DecodeError) as info:
            validate_sensor_id(bad)
        assert info.value.reason == "bad_sensor_id"
        assert "sensor id" in info.value.detail

    def test_rejects_non_string(self) -> None:
        """A non-string id fails with the type named in the detail."""
        with pytest.raises(DecodeError, match=r"bad_sensor_id: .*int"):
            validate_sensor_id(7)  # type: ignore[arg-type]

    @given(st.text(max_size=80))
    def test_accepts_exactly_the_pattern(self, s: str) -> None:
        """Any string is accepted iff it fully matches the pattern and has no '..'."""
        ok = re.fullmatch(SENSOR_ID_PATTERN, s) is not None and ".." not in s
        try:
            validate_sensor_id(s)
        except DecodeError as exc:
            assert not ok and exc.reason == "bad_sensor_id"
        else:
            assert ok


class TestTopicTemplate:
    def test_filter_puts_plus_in_the_sensor_level(self) -> None:
        """The subscription filter replaces the {sensor} level with '+'."""
        assert TopicTemplate("site/{sensor}/raw").filter == "site/+/raw"
        assert TopicTemplate("{sensor}").filter == "+"

    def test_match_returns_the_sensor(self) -> None:
        """A topic of the template's shape yields its sensor id."""
        assert TopicTemplate("site/{sensor}/raw").match("site/no2-07/raw") == "no2-07"

    @pytest.mark.parametrize(
        "topic", ["site/no2-07/ref", "site/no2-07", "site/no2-07/raw/x", "other/no2-07/raw", ""]
    )
    def test_match_returns_none_for_other_topics(self, topic: str) -> None:
        """Topics with other fixed levels or another number of levels do not match."""
        assert TopicTemplate("site/{sensor}/raw").match(topic) is None

    @pytest.mark.parametrize("level", ["..", "", "a b", "x" * 65, "\x01"])
    def test_match_rejects_a_hostile_sensor_level(self, level: str) -> None:
        """A fitting topic whose sensor level is not a valid id raises bad_sensor_id."""
        with pytest.raises(DecodeError) as info:
            TopicTemplate("site/{sensor}/raw").match(f"site/{level}/raw")
        assert info.value.reason == "bad_sensor_id"

    def test_format_builds_the_topic(self) -> None:
        """Formatting puts the sensor id in its level."""
        assert TopicTemplate("out/{sensor}/corrected").format("co2-1") == "out/co2-1/corrected"

    def test_format_rejects_a_bad_sensor(self) -> None:
        """Formatting refuses a sensor id that would break the topic."""
        with pytest.raises(DecodeError, match="bad_sensor_id"):
            TopicTemplate("out/{sensor}").format("a/b")

    @given(valid_ids, st.lists(st.sampled_from(["a", "b-c", "", "x.y"]), max_size=3))
    def test_format_then_match_round_trips(self, sensor: str, tail: list[str]) -> None:
        """Any valid id formatted into a template is matched back out unchanged."""
        tpl = TopicTemplate("/".join(["root", "{sensor}", *tail]))
        assert tpl.match(tpl.format(sensor)) == sensor

    @pytest.mark.parametrize(
        ("template", "message"),
        [
            ("", "non-empty"),
            ("site/raw", "exactly once"),
            ("a/{sensor}/{sensor}", "exactly once"),
            ("site/x{sensor}/raw", "whole level"),
            ("site/{sensor}/{other}", "braces"),
            ("site/+/{sensor}", "wildcards"),
            ("site/{sensor}/#", "wildcards"),
            ("$share/g/{sensor}", "must not start with '\\$'"),
            ("a\x00/{sensor}", "NUL"),
            ("a" * 65536 + "/{sensor}", "longer than"),
        ],
    )
    def test_rejects_bad_templates(self, template: str, message: str) -> None:
        """A template that cannot be a per-sensor topic is refused with a message saying why."""
        with pytest.raises(ArgumentError, match=message):
            TopicTemplate(template)
