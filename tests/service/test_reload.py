"""SIGHUP: one reload policy for service and engine, logged truthfully, recovered exactly."""

from __future__ import annotations

import json
import signal
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from trimtab.config import apply_reload, load_config, parse_config, reloads_live
from trimtab.engine.wiring import engine_settings, make_engine, status_topic
from trimtab.messages import Reading, Reference
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play

from ..support import (
    Daemon,
    Watcher,
    caught_up,
    model_states,
    recovered_engine,
    synthetic_stream,
    write_config,
)


def _events(log: str) -> list[dict[str, Any]]:
    return [json.loads(x) for x in log.splitlines() if x.startswith("{")]


def _wait_log(daemon: Daemon, event: str, timeout: float = 20.0) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for e in _events(daemon.log()):
            if e.get("event") == event:
                return e
        time.sleep(0.1)
    raise AssertionError(f"no {event} in the log:\n{daemon.log()}")


class TestApplyReload:
    def test_one_table_says_what_reloads(self) -> None:
        """Learning, output, tolerance and, with wildcard subscriptions, the served ids reload."""
        base: dict[str, Any] = {"broker": {"client_id": "gw"}, "sensors": {"ids": ["a"]}}
        cfg = parse_config(base)
        assert reloads_live("learning.alpha", cfg) and reloads_live("pairing.tolerance", cfg)
        assert reloads_live("sensors.ids", cfg)
        assert not reloads_live("broker.port", cfg) and not reloads_live("sensors.defaults", cfg)
        per_sensor = parse_config({**base, "topics": {"subscribe": "per_sensor"}})
        assert not reloads_live("sensors.ids", per_sensor)

    def test_applied_config_takes_only_the_live_changes(self) -> None:
        """The applied config has the new live values and keeps the old fixed ones."""
        old = parse_config({"broker": {"client_id": "gw"}, "sensors": {"ids": ["a"]}})
        new = parse_config({"broker": {"client_id": "gw", "port": 1884},
                            "sensors": {"ids": ["a", "b"]}, "pairing": {"tolerance": 60.0},
                            "learning": {"alpha": 0.2}})
        applied, live, later = apply_reload(old, new)
        assert live == ("learning.alpha", "pairing.tolerance", "sensors.ids")
        assert later == ("broker.port",)
        assert applied.sensors.ids == ("a", "b") and applied.pairing.tolerance == 60.0
        assert applied.learning.alpha == 0.2 and applied.broker.port == 1883


class _Run:
    """A daemon on the private broker with its config file, and a stream cut in two halves."""

    def __init__(self, tmp_path: Path, broker: PrivateBroker,
                 text: Callable[[str], str] | None = None) -> None:
        self.cfg_path = write_config(tmp_path / "d", broker.port)
        if text is not None:
            self.cfg_path.write_text(text(self.cfg_path.read_text()))
        self.cfg = load_config(self.cfg_path)
        events = synthetic_stream(240)
        self.before, self.after = events[: len(events) // 2], events[len(events) // 2:]
        self.port = broker.port
        self.watcher = Watcher(broker.port, status_topic(self.cfg))
        self.daemon = Daemon(self.cfg_path, tmp_path / "daemon.log")

    def play(self, events: list[Reading | Reference]) -> None:
        play(events, self.cfg, host="127.0.0.1", port=self.port)

    def reload(self, text: Callable[[str], str]) -> None:
        """Rewrite the config file and send SIGHUP."""
        self.cfg_path.write_text(text(self.cfg_path.read_text()))
        self.daemon.signal(signal.SIGHUP)


class TestReloadOverTheBroker:
    def test_reload_adds_a_sensor_and_recovers_exactly_after_kill9(
            self, tmp_path: Path, broker: PrivateBroker) -> None:
        """A reload adding a sensor, a tolerance and α is served at once, logged truthfully, and
        kill -9 afterwards recovers what an uninterrupted run with the same reload holds."""
        # no periodic checkpoint during the test: only the reload's own one separates the
        # settings, so a reload that skipped it would recover under the wrong ones
        run = _Run(tmp_path, broker, lambda t: t.replace('ids = ["s1", "s2"]', 'ids = ["s1"]')
                   .replace("checkpoint_every = 0.5", "checkpoint_every = 3600.0"))
        cfg1, before, after, daemon, watcher = run.cfg, run.before, run.after, run.daemon, \
            run.watcher
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            run.play(before)
            s1_before = [e for e in before if e.sensor == "s1"]
            assert watcher.wait_for(caught_up(s1_before)), daemon.log()
            run.reload(lambda t: t.replace('ids = ["s1"]', 'ids = ["s1", "s2"]')
                       .replace("tolerance = 30.0", "tolerance = 60.0")
                       .replace("alpha = 0.1", "alpha = 0.2")
                       .replace("keepalive = 10", "keepalive = 20"))
            reloaded = _wait_log(daemon, "config_reloaded")
            assert reloaded["applied"] == ["learning.alpha", "pairing.tolerance", "sensors.ids"]
            assert _wait_log(daemon, "config_reload_needs_restart")["paths"] == [
                "broker.keepalive"]
            assert _wait_log(daemon, "sensors_added")["sensors"] == ["s2"]
            assert watcher.wait_for(lambda w: w.stats is not None
                                    and w.stats.get("reloads") == {"applied": 1}), daemon.log()
            run.play(after)
            assert watcher.wait_for(caught_up(after)), daemon.log()
        finally:
            daemon.kill9()
            watcher.close()
        cfg2 = load_config(run.cfg_path)
        applied, _, _ = apply_reload(cfg1, cfg2)
        expected = make_engine(cfg1)
        for e in before:
            expected.process(e)
        expected.reconfigure(engine_settings(applied))
        for e in after:
            expected.process(e)
        recovered = recovered_engine(cfg2)
        assert model_states(recovered) == model_states(expected)
        served = recovered.model("s2")
        assert served is not None and served.updates > 0  # s2 was learnt from at once

    def test_reload_removing_a_sensor_says_so_and_keeps_its_state(
            self, tmp_path: Path, broker: PrivateBroker) -> None:
        """Removing s2 logs it with its update count; its later messages are refused and
        counted; its learnt state is kept (not served, not lost)."""
        run = _Run(tmp_path, broker)
        cfg1, before, after, daemon, watcher = run.cfg, run.before, run.after, run.daemon, \
            run.watcher
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            run.play(before)
            assert watcher.wait_for(caught_up(before)), daemon.log()
            run.reload(lambda t: t.replace('ids = ["s1", "s2"]', 'ids = ["s1"]'))
            removed = _wait_log(daemon, "sensors_removed")
            assert removed["sensors"] == ["s2"] and removed["state_kept"] is True
            run.play(after)
            s1_after = [e for e in after if e.sensor == "s1"]
            assert watcher.wait_for(caught_up(s1_after)), daemon.log()
            refused = sum(1 for e in after if e.sensor == "s2")
            assert watcher.wait_for(
                lambda w: w.stats is not None
                and w.stats.get("rejected", {}).get("unknown_sensor") == refused), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        expected = make_engine(cfg1)
        for e in before:
            expected.process(e)
        kept = expected.model("s2")
        assert kept is not None and removed["updates"] == {"s2": kept.updates}
        recovered = recovered_engine(load_config(run.cfg_path))
        back = recovered.model("s2")
        assert back is not None and back.theta == kept.theta
