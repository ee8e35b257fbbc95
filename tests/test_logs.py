"""Tests of the logging set-up: formats, level filter, masking, reconfiguration."""

from __future__ import annotations

import io
import json
import logging
import os
from collections.abc import Iterator
from datetime import datetime, timedelta
from typing import Any

import pytest

from trimtab.errors import ConfigError
from trimtab.logs import MASK, configure_logging, get_logger, reset_logging


@pytest.fixture(autouse=True)
def _reset() -> Iterator[None]:
    """Every test starts and ends with structlog's defaults."""
    reset_logging()
    yield
    reset_logging()


def lines(stream: io.StringIO) -> list[dict[str, Any]]:
    """The JSON objects written to ``stream``, one per line."""
    return [json.loads(line) for line in stream.getvalue().splitlines()]


class TestJsonFormat:
    """JSON lines, chosen explicitly or because the stream is not a terminal."""

    def test_one_object_per_line_with_timestamp_level_event(self) -> None:
        """Each event is one JSON object leading with an ISO UTC timestamp, level and event."""
        stream = io.StringIO()
        configure_logging("info", "json", stream)
        get_logger("trimtab.test").info("reference_rejected", sensor="no2-07", reason="late")
        (line,) = stream.getvalue().splitlines()
        record = json.loads(line)
        assert list(record)[:3] == ["timestamp", "level", "event"]
        assert record["level"] == "info" and record["event"] == "reference_rejected"
        assert record["sensor"] == "no2-07" and record["logger"] == "trimtab.test"
        stamp = datetime.fromisoformat(record["timestamp"].replace("Z", "+00:00"))
        assert stamp.utcoffset() == timedelta(0)

    def test_auto_on_a_pipe_is_json(self) -> None:
        """fmt='auto' on a stream that is not a TTY writes JSON."""
        stream = io.StringIO()
        configure_logging(stream=stream)
        get_logger().warning("broker_lost")
        assert lines(stream)[0]["event"] == "broker_lost"

    def test_level_filter(self) -> None:
        """At level 'warning', debug and info events are dropped, warning and error kept."""
        stream = io.StringIO()
        configure_logging("WARNING", "json", stream)
        log = get_logger()
        log.debug("a")
        log.info("b")
        log.warning("c")
        log.error("d")
        assert [r["event"] for r in lines(stream)] == ["c", "d"]

    def test_non_finite_floats_stay_strict_json(self) -> None:
        """NaN and infinity are written as strings, so the line parses as strict JSON."""
        stream = io.StringIO()
        configure_logging("info", "json", stream)
        get_logger().info("residual", value=float("nan"), band=[float("-inf"), 1.0])
        record = json.loads(stream.getvalue(), parse_constant=lambda c: pytest.fail(c))
        assert record["value"] == "nan" and record["band"] == ["-inf", 1.0]

    def test_exception_is_structured_without_locals(self) -> None:
        """An exception is logged as data, without local variables that could hold secrets."""
        stream = io.StringIO()
        configure_logging("info", "json", stream)
        password = "hunter2"  # a local of the failing frame
        try:
            raise ValueError(password[:0] + "bad value")
        except ValueError:
            get_logger().exception("decode_failed")
        text = stream.getvalue()
        assert "hunter2" not in text
        (record,) = lines(stream)
        assert record["exception"][0]["exc_type"] == "ValueError"

    def test_stdlib_records_share_the_format(self) -> None:
        """A record from the standard logging module comes out as the same JSON line."""
        stream = io.StringIO()
        configure_logging("info", "json", stream)
        logging.getLogger("paho.client").warning("socket %s closed", 3)
        (record,) = lines(stream)
        assert record["event"] == "socket 3 closed"
        assert record["logger"] == "paho.client" and record["level"] == "warning"


class TestSecrets:
    """Credentials never reach a log line."""

    def test_secret_keys_are_masked_at_any_depth(self) -> None:
        """password, token and secret keys are masked, top-level and nested, others kept."""
        stream = io.StringIO()
        configure_logging("info", "json", stream)
        get_logger().info(
            "config_loaded",
            password="p1",
            mqtt={"host": "h", "API-Token": "t1", "tls": [{"client_secret": "s1"}]},
        )
        text = stream.getvalue()
        for secret in ("p1", "t1", "s1"):
            assert f'"{secret}"' not in text
        (record,) = lines(stream)
        assert record["password"] == MASK
        assert record["mqtt"] == {"host": "h", "API-Token": MASK, "tls": [{"client_secret": MASK}]}

    def test_console_output_is_masked_too(self) -> None:
        """The console renderer gets the masked value as well."""
        stream = io.StringIO()
        configure_logging("info", "console", stream)
        get_logger().info("connecting", password="hunter2")
        assert "hunter2" not in stream.getvalue()
        assert MASK in stream.getvalue()


class TestConsoleAndReconfigure:
    """The console renderer, TTY detection and calling configure_logging again."""

    def test_auto_on_a_tty_is_console(self) -> None:
        """fmt='auto' on a real pseudo-terminal writes the console format, not JSON."""
        leader, follower = os.openpty()
        with open(follower, "w", closefd=True) as tty:
            configure_logging("info", "auto", tty)
            get_logger().info("daemon_started", sensors=3)
            tty.flush()
            output = os.read(leader, 4096).decode()
        os.close(leader)
        assert "daemon_started" in output and "sensors" in output
        assert not output.lstrip().startswith("{")

    def test_reconfigure_switches_format_and_level(self) -> None:
        """A second call replaces the first: new stream, new format, new level."""
        first, second = io.StringIO(), io.StringIO()
        log = get_logger("trimtab.x")  # made before either call, used after both
        configure_logging("info", "json", first)
        configure_logging("debug", "console", second)
        log.debug("detail_event", n=1)
        logging.getLogger("other").warning("from_stdlib")
        assert first.getvalue() == ""
        assert "detail_event" in second.getvalue() and "from_stdlib" in second.getvalue()
        assert (
            sum(
                isinstance(h, logging.StreamHandler) and h.stream is first
                for h in logging.getLogger().handlers
            )
            == 0
        )

    def test_unknown_level_is_refused(self) -> None:
        """An unknown level name raises ConfigError listing the valid ones."""
        with pytest.raises(ConfigError, match="'loud' is not one of debug, info, warning"):
            configure_logging("loud")

    def test_reset_removes_our_root_handler(self) -> None:
        """reset_logging leaves the stdlib root logger without the handler we added."""
        stream = io.StringIO()
        before = list(logging.getLogger().handlers)
        configure_logging("info", "json", stream)
        reset_logging()
        assert logging.getLogger().handlers == before
        logging.getLogger("x").warning("after_reset")
        assert stream.getvalue() == ""
