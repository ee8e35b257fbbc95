"""`trimtab-sim record` never loses silently: gaps counted against the stream, exit 1, the hint."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from trimtab.config import Config, load_config
from trimtab.engine.wiring import make_codec, topic_templates
from trimtab.messages import Corrected, Reading
from trimtab.wire.streamfile import read_corrected, write_events
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.commands.record import count_gaps

from .. import support
from ..support import synthetic_stream, write_config

BIN = Path(sys.executable).parent


def _corrected(readings: list[Reading]) -> list[Corrected]:
    return [Corrected(t=r.t, sensor=r.sensor, value=r.inputs["raw"], raw=r.inputs["raw"],
                      band=1.0) for r in readings]


def _publish(cfg: Config, port: int, values: list[Corrected]) -> None:
    """Publish corrected values as a daemon would (QoS 1), and wait until all are sent."""
    codec = make_codec(cfg)
    _, _, t_out = topic_templates(cfg)
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="test-fake-daemon")
    client.connect("127.0.0.1", port)
    client.loop_start()
    try:
        infos = [client.publish(t_out.format(c.sensor), codec.encode_corrected(c), qos=1)
                 for c in values]
        for info in infos:
            info.wait_for_publish(10.0)
    finally:
        client.disconnect()
        client.loop_stop()


def _start_record(conf: Path, out: Path, *extra: str) -> subprocess.Popen[str]:
    proc = subprocess.Popen(
        [str(BIN / "trimtab-sim"), "record", "-c", str(conf), "-o", str(out), *extra],
        stderr=subprocess.PIPE, text=True)
    assert proc.stderr is not None
    line = proc.stderr.readline()  # "record: subscribed to …" once the broker has acked
    assert line.startswith("record: subscribed to "), line
    return proc


class TestCountGaps:
    def test_missing_duplicates_and_strangers_are_counted(self) -> None:
        """count_gaps tells missing, duplicate and unexpected values apart, first gap named."""
        readings = [r for r in synthetic_stream(20) if isinstance(r, Reading)]
        keys = [(r.sensor, r.t) for r in readings]
        got = _corrected(readings[:5] + readings[7:] + readings[:1])
        stranger = Corrected(t=1.0, sensor="zz", value=0.0, raw=0.0, band=0.0)
        gaps = count_gaps(keys, [*got, stranger])
        assert (gaps.expected, gaps.arrived, gaps.missing) == (len(keys), len(keys) - 2, 2)
        assert (gaps.duplicates, gaps.unexpected) == (1, 1)
        assert gaps.first_missing == keys[5]


class TestRecordCommand:
    def test_gaps_against_the_stream_exit_1_with_the_broker_setting(
        self, tmp_path: Path, broker: PrivateBroker
    ) -> None:
        """Three corrected values never published: record says how many, names the broker
        setting to raise, and exits 1; what did arrive is written."""
        conf = write_config(tmp_path / "conf", broker.port)
        cfg = load_config(conf)
        events = synthetic_stream(40)
        stream = tmp_path / "s.jsonl"
        write_events(stream, events)
        readings = [e for e in events if isinstance(e, Reading)]
        out = tmp_path / "rec.jsonl"
        proc = _start_record(conf, out, "--expect", str(stream), "--idle", "2", "--fresh")
        sent = readings[:10] + readings[13:]
        _publish(cfg, broker.port, _corrected(sent))
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 1, err
        assert (f"record: 3 of {len(readings)} expected corrected values did not arrive "
                f"(the first: {readings[10].sensor} at t = {readings[10].t!r})") in err
        assert "max_queued_messages" in err
        assert len(list(read_corrected(out))) == len(sent)

    def test_complete_recording_stops_by_itself_and_exits_0(
        self, tmp_path: Path, broker: PrivateBroker
    ) -> None:
        """With every value published, record stops as soon as the last arrives (not idle)."""
        conf = write_config(tmp_path / "conf", broker.port)
        events = synthetic_stream(30)
        stream = tmp_path / "s.jsonl"
        write_events(stream, events)
        readings = [e for e in events if isinstance(e, Reading)]
        proc = _start_record(conf, tmp_path / "rec.jsonl", "--expect", str(stream),
                             "--idle", "300", "--fresh")
        started = time.monotonic()
        _publish(load_config(conf), broker.port, _corrected(readings))
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 0, err
        assert time.monotonic() - started < 60
        assert "did not arrive" not in err

    def test_count_not_reached_exits_1(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """`--count N` with fewer arriving (idle timeout) exits 1 and says how many."""
        conf = write_config(tmp_path / "conf", broker.port)
        readings = [e for e in synthetic_stream(5) if isinstance(e, Reading)]
        proc = _start_record(conf, tmp_path / "rec.jsonl", "--count", "50", "--idle", "1",
                             "--fresh")
        _publish(load_config(conf), broker.port, _corrected(readings))
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 1
        assert f"record: {len(readings)} of the 50 values asked for arrived" in err

    @pytest.mark.persistence
    def test_persistent_session_keeps_what_was_published_while_away(
        self, tmp_path: Path, broker: PrivateBroker
    ) -> None:
        """Values published between two runs with one client id reach the second run."""
        assert support.PROTOCOL == "5"
        conf = write_config(tmp_path / "conf", broker.port)
        cfg = load_config(conf)
        readings = [e for e in synthetic_stream(30) if isinstance(e, Reading)]
        first = _start_record(conf, tmp_path / "a.jsonl", "--idle", "1", "--client-id", "rec-x")
        _publish(cfg, broker.port, _corrected(readings[:5]))
        first.communicate(timeout=60)
        _publish(cfg, broker.port, _corrected(readings[5:]))  # nobody subscribed now
        second = _start_record(conf, tmp_path / "b.jsonl", "--idle", "1",
                               "--client-id", "rec-x")
        _, err = second.communicate(timeout=60)
        assert second.returncode == 0, err
        got = [(c.sensor, c.t) for c in read_corrected(tmp_path / "b.jsonl")]
        assert got == [(r.sensor, r.t) for r in readings[5:]]
