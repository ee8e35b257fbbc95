"""Prometheus metrics: scraped over HTTP and read with prometheus-client's own parser."""

from __future__ import annotations

import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

from trimtab.config import MetricsSettings, load_config, parse_config
from trimtab.engine.engine import RefOutcome
from trimtab.engine.wiring import status_topic
from trimtab.errors import ConfigError
from trimtab.messages import Reference
from trimtab.service.metrics import LATENCY_BUCKETS, LatencyHistogram, Metrics, reference_outcome
from trimtab_sim.broker import PrivateBroker, free_port
from trimtab_sim.mqttio import play

from ..support import Daemon, Watcher, caught_up, replay_engine, synthetic_stream, write_config

Samples = dict[tuple[str, tuple[tuple[str, str], ...]], float]


def scrape(port: int) -> tuple[Samples, dict[str, str]]:
    """GET /metrics; every sample by (name, sorted labels), and each family's type."""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as resp:
        text = resp.read().decode("utf-8")
    samples: Samples = {}
    types: dict[str, str] = {}
    for fam in text_string_to_metric_families(text):
        types[fam.name] = fam.type
        for s in fam.samples:
            samples[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return samples, types


def metrics_config(directory: Path, broker_port: int, metrics_port: int, **kw: Any) -> Path:
    """A test daemon config with the metrics endpoint on ``metrics_port``."""
    extra = f"\n[metrics]\nenabled = true\nport = {metrics_port}\n" + kw.pop("extra", "")
    return write_config(directory, broker_port, extra=extra, **kw)


class TestPieces:
    def test_histogram_buckets_are_cumulative(self) -> None:
        """Observations land in the first bucket whose bound they do not exceed; +Inf holds all."""
        h = LatencyHistogram()
        for v in (0.0004, 0.0005, 0.003, 0.003, 7.0, 60.0):
            h.observe(v)
        buckets, total = h.cumulative()
        got = dict(buckets)
        assert got["0.0005"] == 2 and got["0.002"] == 2 and got["0.005"] == 4
        assert got["10.0"] == 5 and got["+Inf"] == 6
        assert total == pytest.approx(67.0069)
        assert [b for b, _ in buckets][:-1] == [repr(b) for b in LATENCY_BUCKETS]

    def test_reference_outcomes(self) -> None:
        """Engine statuses map onto applied, gated, duplicate, unmatched, rejected, deferred."""
        assert reference_outcome("applied") == reference_outcome("level_shift") == "applied"
        assert reference_outcome("gated") == "gated"
        assert reference_outcome("out_of_order") == "duplicate"
        assert reference_outcome("no_reading_in_window") == "unmatched"
        assert reference_outcome("rolled_back") == "rejected"
        assert reference_outcome("pending") == "deferred"

    def test_config_defaults_and_rules(self) -> None:
        """Metrics are off by default, bound to localhost, and a bad port is refused."""
        cfg = parse_config({"broker": {"client_id": "gw"}, "sensors": {"ids": ["s1"]}})
        assert not cfg.metrics.enabled and cfg.metrics.host == "127.0.0.1"
        with pytest.raises(ConfigError) as info:
            parse_config({"broker": {"client_id": "gw"}, "sensors": {"ids": ["s1"]},
                          "metrics": {"port": 70000, "enabeld": True}}, "site.toml")
        assert info.value.errors[0].startswith("site.toml: metrics.port: ")
        assert "did you mean 'enabled'?" in info.value.errors[1]

    def test_in_process_endpoint_with_label_cap(self, tmp_path: Path) -> None:
        """An engine's figures are exposed; pattern sensors beyond the cap are only counted."""
        cfg_path = write_config(tmp_path, 1883)  # never connects: only the config is used
        cfg = load_config(cfg_path)
        events = synthetic_stream(240)
        engine, _ = replay_engine(cfg, events)
        m = Metrics(MetricsSettings(port=free_port(), max_sensor_labels=1))
        m.start()
        try:
            refs = [e for e in events if isinstance(e, Reference)]
            m.references([RefOutcome("s1", "applied", 0.5), RefOutcome("s1", "applied", -0.1),
                          RefOutcome("s2", "applied", 9.0)])
            m.batch({"processed": len(events)}, {"sent": 3}, [0.001] * len(events))
            m.refresh(engine, connected=True, reconnects=2, checkpoint_age=3.0, journal_age=1.5,
                      journal_records=7, held=0, rejected={"bad_json": 4})
            assert m.port is not None
            samples, types = scrape(m.port)
        finally:
            m.stop()
        model = engine.model("s1")
        assert model is not None
        coef = model.coefficients()
        assert samples[("trimtab_sensor_gain", (("sensor", "s1"),))] == coef["raw"]
        assert samples[("trimtab_sensor_offset", (("sensor", "s1"),))] == coef["offset"]
        assert samples[("trimtab_sensor_bias", (("sensor", "s1"),))] == pytest.approx(0.2)
        assert samples[("trimtab_sensor_updates_total", (("sensor", "s1"),))] == model.updates
        assert not any(labels == (("sensor", "s2"),) for _, labels in samples)
        assert samples[("trimtab_sensor_labels_overflow", ())] == 1
        assert samples[("trimtab_messages_received_total", (("outcome", "processed"),))] == len(
            events)
        assert samples[("trimtab_messages_rejected_total", (("reason", "bad_json"),))] == 4
        assert samples[("trimtab_processing_latency_seconds_count", ())] == len(events)
        assert samples[("trimtab_mqtt_reconnects_total", ())] == 2
        assert samples[("trimtab_journal_records", ())] == 7
        applied = engine.counts["reference_applied"]
        assert samples[("trimtab_references_total",
                        (("outcome", "applied"), ("reason", "applied")))] == applied
        assert 0 < applied <= len(refs)
        assert types["trimtab_processing_latency_seconds"] == "histogram"
        assert types["trimtab_mqtt_connected"] == "gauge"
        assert types["trimtab_references"] == "counter"
        ours = {name for name, _ in samples if not name.startswith(("process_", "python_"))}
        assert all(n.startswith("trimtab_") for n in ours)

    def test_port_in_use_is_a_clear_error(self) -> None:
        """A port already taken stops the start with the address and the keys to change."""
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            s.listen()
            port = s.getsockname()[1]
            m = Metrics(MetricsSettings(port=port))
            with pytest.raises(Exception, match=rf"metrics: cannot listen on 127.0.0.1:{port}"):
                m.start()


class TestDaemonEndpoint:
    def test_scrape_matches_replay(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """A scrape of the running daemon agrees with an offline replay of the same stream."""
        mport = free_port()
        cfg_path = metrics_config(tmp_path / "d", broker.port, mport)
        cfg = load_config(cfg_path)
        events = synthetic_stream(300)
        watcher = Watcher(broker.port, status_topic(cfg))
        daemon = Daemon(cfg_path, tmp_path / "daemon.log").start()
        try:
            assert watcher.wait_for(lambda w: w.status == "online"), daemon.log()
            play(events, cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events)), daemon.log()
            time.sleep(2.5)  # one metrics refresh after the last batch
            samples, _ = scrape(mport)
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        engine, outs = replay_engine(cfg, events)
        assert samples[("trimtab_messages_received_total", (("outcome", "processed"),))] == len(
            events)
        assert samples[("trimtab_messages_published_total", (("outcome", "sent"),))] == len(outs)
        assert samples[("trimtab_processing_latency_seconds_count", ())] == len(events)
        assert samples[("trimtab_mqtt_connected", ())] == 1
        for status in ("applied", "gated", "duplicate"):
            key = ("trimtab_references_total", (("outcome", reference_outcome(status)),
                                                ("reason", status)))
            assert samples.get(key, 0) == engine.counts[f"reference_{status}"]
        for s in ("s1", "s2"):
            model = engine.model(s)
            assert model is not None
            stats = engine.stats()["sensors"][s]
            assert samples[("trimtab_sensor_rmse", (("sensor", s),))] == stats["rmse"]
            assert samples[("trimtab_sensor_gain", (("sensor", s),))] == \
                model.coefficients()["raw"]
            assert samples[("trimtab_sensor_updates_total", (("sensor", s),))] == model.updates

    def test_endpoint_listens_on_localhost_only(self, tmp_path: Path,
                                                broker: PrivateBroker) -> None:
        """By default the endpoint is bound to 127.0.0.1, not to every interface."""
        mport = free_port()
        cfg_path = metrics_config(tmp_path / "d", broker.port, mport)
        cfg = load_config(cfg_path)
        watcher = Watcher(broker.port, status_topic(cfg))
        daemon = Daemon(cfg_path, tmp_path / "daemon.log").start()
        try:
            assert watcher.wait_for(lambda w: w.status == "online"), daemon.log()
            out = subprocess.run(["ss", "-Hltn", f"sport = :{mport}"], capture_output=True,
                                 text=True, check=False)
            if out.returncode != 0:
                pytest.skip("ss (iproute2) not available to list listening sockets")
            assert out.stdout.split()[3] == f"127.0.0.1:{mport}", out.stdout
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()


BLOCKED = ("import sys; sys.modules['prometheus_client'] = None; "
           "from trimtab.cli import main; sys.exit(main(['run', '-c', sys.argv[1]]))")


class TestWithoutPrometheusClient:
    def test_service_does_not_import_it(self) -> None:
        """Importing the daemon's modules does not import prometheus-client."""
        code = ("import sys, trimtab.service, trimtab.commands.run; "
                "sys.exit('prometheus_client' in sys.modules)")
        assert subprocess.run([sys.executable, "-c", code], timeout=60).returncode == 0

    def test_disabled_runs_and_enabled_refuses(self, tmp_path: Path,
                                               broker: PrivateBroker) -> None:
        """Without the package: metrics off runs normally; metrics on exits 2 saying why."""
        off = write_config(tmp_path / "off", broker.port, client_id="no-metrics")
        watcher = Watcher(broker.port, status_topic(load_config(off)))
        with open(tmp_path / "off.log", "wb") as log:
            proc = subprocess.Popen([sys.executable, "-c", BLOCKED, str(off)], stdout=log,
                                    stderr=log)
        try:
            assert watcher.wait_for(lambda w: w.status == "online"), (tmp_path / "off.log"
                                                                      ).read_text()
            proc.terminate()
            assert proc.wait(20) == 0
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
            watcher.close()
        on = metrics_config(tmp_path / "on", broker.port, free_port(), client_id="metrics")
        done = subprocess.run([sys.executable, "-c", BLOCKED, str(on)], capture_output=True,
                              text=True, timeout=60)
        assert done.returncode == 2
        assert "metrics.enabled = true needs prometheus-client" in done.stderr
