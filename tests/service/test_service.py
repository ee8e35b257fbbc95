"""The service's intake, without a broker: what decode refuses, and why."""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest

from trimtab.config import load_config
from trimtab.errors import DecodeError
from trimtab.messages import Reading
from trimtab.service.daemon import Service
from trimtab.service.intake import Inbound, engine_refusals

from ..support import write_config


@pytest.fixture
def service(tmp_path: Path) -> Service:
    return Service(load_config(write_config(tmp_path / "d", 1883)))


class TestTimeSanity:
    def test_a_reading_stamped_far_ahead_of_the_clock_is_refused(self, service: Service) -> None:
        """A reading from the year 9999 never reaches the engine (it would become the clock)."""
        payload = json.dumps({"t": 253402300799.0, "raw": 40.0, "temp": 20.0}).encode()
        with pytest.raises(DecodeError) as err:
            service.decode(Inbound("t/s1/raw", payload, 1, 1))
        assert err.value.reason == "future_time"

    def test_a_reference_ahead_by_more_than_max_future_is_refused(self, service: Service) -> None:
        """pairing.max_future (600 s here) is the limit for references too."""
        ahead = time.time() + service.cfg.pairing.max_future + 60.0
        payload = json.dumps({"t": ahead, "value": 40.0}).encode()
        with pytest.raises(DecodeError, match="future_time"):
            service.decode(Inbound("t/s1/ref", payload, 1, 1))

    def test_now_and_the_past_are_accepted(self, service: Service) -> None:
        """Late and replayed data are normal: only the future is refused."""
        for t in (time.time(), time.time() + 60.0, 1_000_000_000.0):
            payload = json.dumps({"t": t, "raw": 40.0, "temp": 20.0}).encode()
            event, serve, _ = service.decode(Inbound("t/s1/raw", payload, 1, 1))
            assert isinstance(event, Reading) and serve


class TestRefusalsAreLogged:
    def test_only_refusals_and_guard_actions_that_grew_are_reported(self) -> None:
        """Accepted readings and applied references are not refusals; gated ones are."""
        before = {"reading_accepted": 5, "reference_gated": 1, "reference_applied": 3}
        after = {"reading_accepted": 9, "reference_gated": 3, "reference_applied": 4,
                 "reading_sensor_limit": 2, "reference_rate_limited": 0}
        assert engine_refusals(before, after) == {"reading_sensor_limit": 2,
                                                  "reference_gated": 2}
