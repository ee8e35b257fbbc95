"""Static shards: the hash, the config rules, subscriptions, and moving a sensor between daemons."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
import zlib
from pathlib import Path
from typing import Any

import pytest

from trimtab.config import Config, load_config, parse_config
from trimtab.engine.engine import Engine
from trimtab.engine.wiring import status_topic
from trimtab.errors import ConfigError
from trimtab.messages import Reading, Reference
from trimtab.service.shards import HeldFile, SubscriptionLedger, plan_subscriptions, shard_of
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play

from ..support import (
    BIN,
    Daemon,
    Watcher,
    model_states,
    recovered_engine,
    replay_engine,
    synthetic_stream,
    write_config,
)

SENSORS = ("s1", "s2", "s4", "s5")  # CRC-32 mod 2: s1, s2 → shard 0; s4, s5 → shard 1
MOVED = "s2"


def doc(**sensors: Any) -> dict[str, Any]:
    """A minimal config document with the given ``[sensors]`` keys."""
    return {"broker": {"client_id": "gw-test"}, "sensors": sensors}


def errors_of(document: dict[str, Any]) -> list[str]:
    """The error lines a document is refused with (fails the test if it is accepted)."""
    with pytest.raises(ConfigError) as info:
        parse_config(document, "site.toml")
    return info.value.errors


class TestShardOf:
    def test_crc32_check_value(self) -> None:
        """The hash is CRC-32/ISO-HDLC: check value 0xCBF43926 for b"123456789".

        Source: the catalogue of parametrised CRC algorithms (reveng.sourceforge.io), entry
        CRC-32/ISO-HDLC, check = 0xcbf43926 (value quoted from memory, confirmed by zlib).
        """
        assert zlib.crc32(b"123456789") == 0xCBF43926
        assert shard_of("123456789", 1 << 32) == 0xCBF43926
        assert shard_of("123456789", 7) == 0xCBF43926 % 7

    def test_same_in_another_process_with_another_hash_seed(self) -> None:
        """Shards do not depend on Python's per-process salted hash()."""
        ids = [f"pm-{i:03d}" for i in range(50)]
        code = ("import json,sys; from trimtab.service.shards import shard_of; "
                f"print(json.dumps([shard_of(x, 5) for x in {ids!r}]))")
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             check=True, env={**os.environ, "PYTHONHASHSEED": "12345"})
        assert json.loads(out.stdout) == [shard_of(x, 5) for x in ids]

    def test_spreads_ids_over_shards(self) -> None:
        """1000 ids over 4 shards: every shard gets between 200 and 300."""
        counts = [0] * 4
        for i in range(1000):
            counts[shard_of(f"sensor-{i}", 4)] += 1
        assert all(200 <= c <= 300 for c in counts), counts

    def test_refuses_zero_shards(self) -> None:
        """A shard count below one is refused with the project's ConfigError."""
        with pytest.raises(ConfigError, match="shard count 0"):
            shard_of("s1", 0)


class TestShardConfig:
    def test_pattern_split_by_shard(self) -> None:
        """With a pattern, shard i of n serves exactly the matched ids that hash to i."""
        cfgs = [parse_config(doc(pattern="s[0-9]+", shard_count=2, shard_index=i))
                for i in (0, 1)]
        for sid in SENSORS:
            served = [c.sensor_allowed(sid) for c in cfgs]
            assert served == [shard_of(sid, 2) == 0, shard_of(sid, 2) == 1]

    def test_ids_are_pinned_and_exclude_wins_over_pattern(self) -> None:
        """Listed ids are served whatever their shard; excluded ids never are."""
        cfg = parse_config(doc(pattern="s[0-9]+", shard_count=2, shard_index=1, ids=["s1"],
                               exclude=["s4"]))
        assert cfg.sensor_allowed("s1")
        assert not cfg.sensor_allowed("s4")
        assert cfg.sensor_allowed("s5")
        assert cfg.sensors.elsewhere("s4") and cfg.sensors.elsewhere("s2")
        assert not cfg.sensors.elsewhere("zz")

    def test_incoming_is_not_served(self) -> None:
        """An incoming id is known (overrides allowed) but not served until it moves to ids."""
        cfg = parse_config(doc(ids=["s1"], incoming=["s2"],
                               overrides={"s2": {"scaler_readings": 30}}))
        assert not cfg.sensor_allowed("s2")
        assert cfg.sensor_settings("s2").scaler_readings == 30

    def test_rules(self) -> None:
        """Bad shard settings are refused with their paths and the rule."""
        assert errors_of(doc(pattern="s.*", shard_count=2, shard_index=2)) == [
            "site.toml: sensors.shard_index: 2 is not below shard_count = 2 "
            "(rule: 0 ≤ shard_index < shard_count)"]
        assert errors_of(doc(ids=["s1"], shard_count=2))[0].startswith(
            "site.toml: sensors.shard_count: hash shards split the ids sensors.pattern matches")
        assert errors_of(doc(ids=["s1", "s2"], exclude=["s2"], incoming=["s1"])) == [
            "site.toml: sensors.exclude: ['s2'] also listed in sensors.ids; a sensor is in one "
            "of them",
            "site.toml: sensors.incoming: ['s1'] also listed in sensors.ids; a sensor is in one "
            "of them",
        ]
        assert errors_of({**doc(pattern="s.*"), "topics": {"subscribe": "per_sensor"}}) == [
            "site.toml: topics.subscribe: per_sensor subscribes the topics of the ids listed; "
            "with sensors.pattern set, use wildcard"]

    def test_shared_reference_serves_only_this_daemons_sensors(self) -> None:
        """A shared stream serving sensors of two shards serves only this shard's here."""
        document = doc(pattern="s[0-9]+", shard_count=2, shard_index=0,
                       shared_references=[{"source": "ref-a", "serves": list(SENSORS)}])
        cfg = parse_config(document)
        assert cfg.reference_targets("ref-a") == ("s1", "s2")


class TestSubscriptions:
    def test_per_sensor_filters(self) -> None:
        """per_sensor subscribes each listed and incoming sensor and their shared streams."""
        cfg = parse_config({
            **doc(ids=["s1"], incoming=["s2"],
                  shared_references=[{"source": "ref-a", "serves": ["s2"]}]),
            "topics": {"subscribe": "per_sensor"},
        })
        assert plan_subscriptions(cfg) == [
            "sensors/ref-a/reference", "sensors/s1/raw", "sensors/s1/reference",
            "sensors/s2/raw", "sensors/s2/reference"]

    def test_wildcard_filters(self) -> None:
        """wildcard subscribes one + filter per template."""
        cfg = parse_config(doc(pattern="s.*"))
        assert plan_subscriptions(cfg) == ["sensors/+/raw", "sensors/+/reference"]

    def test_ledger_names_stale_filters(self, tmp_path: Path) -> None:
        """Filters an earlier run subscribed and this one does not want are stale."""
        ledger = SubscriptionLedger(tmp_path)
        assert ledger.stale(["a/+"]) == []
        ledger.write(["a/+", "b/s1", "b/s2"])
        assert ledger.stale(["b/s1"]) == ["a/+", "b/s2"]
        (tmp_path / "subscriptions.json").write_text("[1]")
        with pytest.raises(Exception, match="subscription ledger"):
            ledger.read()


class TestHeldFile:
    def test_keeps_records_across_reopen_and_rewrites(self, tmp_path: Path) -> None:
        """Held records survive a reopen; keep_only rewrites the file, or removes it when empty."""
        held = HeldFile(tmp_path, "flush")
        held.open()
        held.append({"t": 5.0, "sensor": "s2", "reading": {"raw": 1.0}})
        held.append({"t": 6.0, "sensor": "s2", "reference": 2.0})
        held.sync()
        held.close()
        again = HeldFile(tmp_path, "flush")
        again.open()
        assert again.count == 2 and again.first_t == {"s2": 5.0}
        again.keep_only([{"t": 6.0, "sensor": "s2", "reference": 2.0}])
        assert HeldFile(tmp_path, "flush").records() == [{"t": 6.0, "sensor": "s2",
                                                          "reference": 2.0}]
        again.keep_only([])
        assert not (tmp_path / "held.log").exists()


# -- two daemons on one broker ------------------------------------------------------------------


def shard_config(directory: Path, port: int, client_id: str, sensors: str,
                 subscribe: str) -> Path:
    """A test daemon config (see support.write_config) with its own ``[sensors]`` keys."""
    path = write_config(directory, port, client_id=client_id)
    text = path.read_text()
    text = text.replace('ids = ["s1", "s2"]', sensors, 1)
    text = text.replace("qos = 1\n", f'qos = 1\nsubscribe = "{subscribe}"\n', 1)
    path.write_text(text)
    return path


def sensors_block(mode: str, served: list[str], *, shard: int, exclude: tuple[str, ...] = (),
                  incoming: tuple[str, ...] = (), pinned: tuple[str, ...] = ()) -> str:
    """The ``[sensors]`` keys of one daemon: hash shard of a pattern, or an explicit list."""
    lines = [f"exclude = {json.dumps(list(exclude))}", f"incoming = {json.dumps(list(incoming))}"]
    if mode == "hash":
        lines += ['pattern = "s[0-9]+"', "shard_count = 2", f"shard_index = {shard}",
                  f"ids = {json.dumps(list(pinned))}"]
    else:
        lines.append(f"ids = {json.dumps(sorted(set(served) | set(pinned)))}")
    return "\n".join(lines)


def cli(*args: str) -> None:
    """Run a ``trimtab`` sub-command; fail the test with its output if it fails."""
    proc = subprocess.run([str(BIN / "trimtab"), *args], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0, proc.stderr


def sensor_t(w: Watcher, sensor: str) -> float:
    """The last reading time the watched daemon reports for a sensor (−inf if none)."""
    s = ((w.stats or {}).get("sensors") or {}).get(sensor) or {}
    t = s.get("last_reading_t")
    return float("-inf") if t is None else float(t)


def updates_of(engine: Engine, sensor: str) -> int:
    """References applied to a sensor's model (fails the test if it has none)."""
    model = engine.model(sensor)
    assert model is not None, sensor
    return model.updates


def caught_up_with(events: list[Reading | Reference], sensors: set[str]) -> Any:
    """A predicate: the watched daemon has the last reading of each of ``sensors``."""
    last = {e.sensor: e.t for e in events if isinstance(e, Reading) and e.sensor in sensors}
    return lambda w: all(sensor_t(w, s) >= t for s, t in last.items())


@pytest.mark.persistence
class TestMoveSensor:
    @pytest.mark.parametrize("mode", ["hash", "per_sensor"])
    def test_move_while_references_flow(self, tmp_path: Path, broker: PrivateBroker,
                                        mode: str) -> None:
        """Moving a sensor between two live daemons loses no reference and applies none twice."""
        subscribe = "wildcard" if mode == "hash" else "per_sensor"
        a_own, b_own = ["s1", "s2"], ["s4", "s5"]
        port = broker.port
        a_path = shard_config(tmp_path / "a", port, "shard-a",
                              sensors_block(mode, a_own, shard=0), subscribe)
        b_path = shard_config(tmp_path / "b", port, "shard-b",
                              sensors_block(mode, b_own, shard=1), subscribe)
        a_cfg, b_cfg = load_config(a_path), load_config(b_path)
        assert [s for s in SENSORS if a_cfg.sensor_allowed(s)] == a_own
        assert [s for s in SENSORS if b_cfg.sensor_allowed(s)] == b_own
        events = synthetic_stream(560, sensors=SENSORS)
        cut = len(events) - 40
        head, tail = events[:cut], events[cut:]
        wa = Watcher(port, status_topic(a_cfg))
        wb = Watcher(port, status_topic(b_cfg))
        a = Daemon(a_path, tmp_path / "a.log").start()
        b = Daemon(b_path, tmp_path / "b.log").start()
        player = threading.Thread(target=play, args=(head, a_cfg),
                                  kwargs={"host": "127.0.0.1", "port": port, "speed": 280.0})
        online = lambda w: w.status == "online"  # noqa: E731
        try:
            assert wa.wait_for(online) and wb.wait_for(online), a.log() + b.log()
            player.start()
            time.sleep(3.0)
            # 1. The new owner subscribes to the sensor and holds its messages.
            b_path.write_text(b_path.read_text().replace(
                sensors_block(mode, b_own, shard=1),
                sensors_block(mode, b_own, shard=1, incoming=(MOVED,))))
            assert b.terminate() == 0
            b.start()
            assert wb.wait_for(lambda w: MOVED in (w.stats or {}).get("held", {})
                               .get("first_t", {}), timeout=30), b.log()
            first_held = float((wb.stats or {})["held"]["first_t"][MOVED])
            # 2. The old owner has processed everything published before that subscription.
            assert wa.wait_for(lambda w: sensor_t(w, MOVED) >= first_held), a.log()
            # 3. Old owner: stop, export and drop the sensor, exclude it, start again.
            assert a.terminate() == 0
            export = tmp_path / f"{MOVED}.json"
            cli("state", "export", MOVED, "-c", str(a_path), "-o", str(export), "--drop")
            a_path.write_text(a_path.read_text().replace(
                sensors_block(mode, a_own, shard=0),
                sensors_block(mode, ["s1"], shard=0, exclude=(MOVED,))))
            a.start()
            # 4. New owner: stop, serve the sensor, import its state, start again.
            assert b.terminate() == 0
            b_path.write_text(b_path.read_text().replace(
                sensors_block(mode, b_own, shard=1, incoming=(MOVED,)),
                sensors_block(mode, b_own, shard=1, pinned=(MOVED,))))
            cli("state", "import", str(export), "-c", str(b_path))
            b.start()
            assert player.is_alive(), "the stream ended before the move did; slow it down"
            player.join(120)
            assert wa.wait_for(caught_up_with(head, {"s1"}), timeout=60), a.log()
            assert wb.wait_for(caught_up_with(head, {"s4", "s5", MOVED}), timeout=60), b.log()
            time.sleep(1.0)  # two stats periods: the head's last foreign messages are counted
            foreign_before = int((wa.stats or {}).get("foreign", 0))
            play(tail, a_cfg, host="127.0.0.1", port=port)
            assert wb.wait_for(caught_up_with(events, {"s4", "s5", MOVED}), timeout=60), b.log()
            assert wa.wait_for(caught_up_with(events, {"s1"}), timeout=60), a.log()
            time.sleep(1.0)  # a stats period, so late foreign messages would be counted
            foreign_after = int((wa.stats or {}).get("foreign", 0))
            assert a.terminate() == 0 and b.terminate() == 0
        finally:
            a.kill9()
            b.kill9()
            wa.close()
            wb.close()
        everyone = Config.model_validate(
            {**a_cfg.model_dump(by_alias=True), "sensors": {"ids": list(SENSORS),
                                                            "defaults": {"inputs": ["raw", "temp"],
                                                                         "scaler_readings": 20}}})
        expected, _ = replay_engine(everyone, events)
        got_a = recovered_engine(load_config(a_path))
        got_b = recovered_engine(load_config(b_path))
        assert got_a.sensors() == ["s1"] and got_b.sensors() == ["s2", "s4", "s5"]
        states = {**model_states(got_a), **model_states(got_b)}
        want = model_states(expected)
        for sid in SENSORS:
            differ = sorted(k for k in want[sid] if states[sid].get(k) != want[sid][k])
            assert not differ, (sid, differ, {k: (states[sid][k], want[sid][k])
                                              for k in differ if k != "buffer"})
        updates = {s: updates_of(got_a if s == "s1" else got_b, s) for s in SENSORS}
        assert updates == {s: updates_of(expected, s) for s in SENSORS}
        assert min(updates.values()) > 40
        others = sum(1 for e in tail if e.sensor != "s1")  # what A now drops as foreign
        assert foreign_after - foreign_before == (others if mode == "hash" else 0)
        assert "handover_gap" not in b.log() and "handover_without_state" not in b.log()
        assert '"event": "held_events_released"' in b.log()
