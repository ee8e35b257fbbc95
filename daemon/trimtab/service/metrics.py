"""Prometheus metrics: an optional HTTP endpoint, fed from the daemon's main loop.

prometheus-client (the ``metrics`` extra) is imported only when ``[metrics] enabled = true``;
the daemon runs without it otherwise. The main loop updates plain counters once per batch and
refreshes a snapshot of the engine's per-sensor figures every few seconds, under one lock; a
custom collector turns them into metric families when the endpoint is scraped, on the HTTP
server's thread. So the hot path never touches prometheus-client and a scrape never touches the
engine.

Names follow Prometheus naming practice (common practice, as its documentation describes it):
the ``trimtab_`` prefix, ``_total`` on counters, base units (seconds) in the name. Per-sensor
series carry a ``sensor`` label only for sensors this daemon serves: ids from ``sensors.ids``
always, pattern-matched ones up to ``metrics.max_sensor_labels`` in the order they appear; the
others are counted in ``trimtab_sensor_labels_overflow``. Label sets are never removed while the
process runs, so a series does not flicker.

Families (config/README.md lists them all, with their labels):

- ``trimtab_messages_received_total{outcome}``: processed, rejected, foreign, held, redelivered
- ``trimtab_messages_rejected_total{reason}``: decode failures by reason
- ``trimtab_messages_published_total{outcome}``: sent, delivered, deferred, failed, refused
  (corrected values, from the service's outbox)
- ``trimtab_readings_total{outcome}`` and ``trimtab_references_total{outcome,reason}``
- ``trimtab_processing_latency_seconds``: receipt on the network thread to acknowledgement
- ``trimtab_mqtt_connected``, ``trimtab_mqtt_reconnects_total``
- ``trimtab_checkpoint_age_seconds``, ``trimtab_journal_age_seconds``, ``trimtab_journal_records``
- ``trimtab_sensor_rmse``, ``trimtab_sensor_bias``, ``trimtab_sensor_gain``,
  ``trimtab_sensor_offset``, ``trimtab_sensor_updates_total`` (label ``sensor``)
"""

from __future__ import annotations

import bisect
import importlib
import socket
import socketserver
import threading
from collections import Counter, deque
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

from trimtab import __version__
from trimtab.errors import ConfigError, TransportError

if TYPE_CHECKING:
    from trimtab.config import MetricsSettings
    from trimtab.engine.engine import Engine, RefOutcome

__all__ = ["LATENCY_BUCKETS", "LatencyHistogram", "Metrics", "reference_outcome"]

LATENCY_BUCKETS: tuple[float, ...] = (
    0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0,
)
"""Upper bounds (s) of the latency histogram: 0.5 ms to 10 s, roughly 1-2-5 steps."""

BIAS_WINDOW = 32
"""Paired references the per-sensor bias is averaged over (the most recent ones)."""

_REFERENCE_OUTCOMES = {
    "applied": "applied", "level_shift": "applied",
    "gated": "gated", "stuck": "gated",
    "duplicate": "duplicate", "out_of_order": "duplicate",
    "non_finite": "rejected", "rolled_back": "rejected", "unknown_sensor": "rejected",
    "pending_overflow": "rejected",
    "pending": "deferred",
}


def reference_outcome(status: str) -> str:
    """The coarse outcome of an engine reference status; unmatched for pairing failures."""
    return _REFERENCE_OUTCOMES.get(status, "unmatched")


class LatencyHistogram:
    """Fixed-bucket histogram of seconds; ``observe`` costs one bisect (main thread only)."""

    def __init__(self, buckets: Sequence[float] = LATENCY_BUCKETS) -> None:
        self.bounds = tuple(buckets)
        self.counts = [0] * (len(self.bounds) + 1)  # the last one is +Inf
        self.sum = 0.0

    def observe(self, seconds: float) -> None:
        self.counts[bisect.bisect_left(self.bounds, seconds)] += 1
        self.sum += seconds

    def cumulative(self) -> tuple[list[tuple[str, float]], float]:
        """Buckets as (le, cumulative count) with ``+Inf`` last, and the sum."""
        out: list[tuple[str, float]] = []
        total = 0
        for bound, n in zip((*map(repr, self.bounds), "+Inf"), self.counts, strict=True):
            total += n
            out.append((bound, float(total)))
        return out, self.sum


@dataclass(slots=True)
class _SensorFigures:
    rmse: float | None
    bias: float | None
    gain: float | None
    offset: float | None
    updates: int


@dataclass(slots=True)
class _Snapshot:
    connected: bool = False
    reconnects: int = 0
    checkpoint_age: float = 0.0
    journal_age: float = 0.0
    journal_records: int = 0
    held: int = 0
    sensors_total: int = 0
    overflow: int = 0
    engine_counts: dict[str, int] = field(default_factory=dict)
    sensors: dict[str, _SensorFigures] = field(default_factory=dict)


class _QuietHandler(WSGIRequestHandler):
    def log_message(self, format: str, *args: Any) -> None:
        """Scrapes are not logged (they come every few seconds)."""


class _Server(socketserver.ThreadingMixIn, WSGIServer):
    daemon_threads = True


class Metrics:
    """The daemon's metrics: counters from the main loop, an HTTP endpoint for scrapes."""

    def __init__(self, settings: MetricsSettings, pinned: Iterable[str] = ()) -> None:
        self.settings = settings
        self._lock = threading.Lock()
        self.received: Counter[str] = Counter()
        self.published: Counter[str] = Counter()
        self.rejected: Mapping[str, int] = {}
        self.latency = LatencyHistogram()
        self._pinned = set(pinned)
        self._labelled: set[str] = set(self._pinned)
        self._overflow: set[str] = set()
        self._residuals: dict[str, deque[float]] = {}
        self._snap = _Snapshot()
        self._server: WSGIServer | None = None
        self._thread: threading.Thread | None = None

    # -- main thread -------------------------------------------------------------------------

    def batch(self, received: Mapping[str, int], published: Mapping[str, int],
              latencies: Iterable[float]) -> None:
        """Count one handled batch: messages by outcome and their processing latencies."""
        with self._lock:
            self.received.update(received)
            self.published.update(published)
            for seconds in latencies:
                self.latency.observe(seconds)

    def references(self, outcomes: Iterable[RefOutcome]) -> None:
        """Remember the residuals of paired references, for the per-sensor bias."""
        for o in outcomes:
            if o.residual is None or not self._label(o.sensor):
                continue
            window = self._residuals.get(o.sensor)
            if window is None:
                window = self._residuals[o.sensor] = deque(maxlen=BIAS_WINDOW)
            window.append(o.residual)

    def _label(self, sensor: str) -> bool:
        """Whether a sensor gets per-sensor series (bounded by ``max_sensor_labels``)."""
        if sensor in self._labelled:
            return True
        if len(self._labelled) - len(self._pinned) >= self.settings.max_sensor_labels:
            self._overflow.add(sensor)
            return False
        self._labelled.add(sensor)
        return True

    def refresh(self, engine: Engine, *, connected: bool, reconnects: int,
                checkpoint_age: float, journal_age: float, journal_records: int,
                held: int, rejected: Mapping[str, int]) -> None:
        """Take a new snapshot of the engine and the service (every few seconds)."""
        figures: dict[str, _SensorFigures] = {}
        stats = engine.stats()
        per: dict[str, Any] = stats["sensors"]
        for name, s in per.items():
            if not self._label(name):
                continue
            model = engine.model(name)
            gain = offset = None
            if model is not None:
                coef = model.coefficients()
                gain = coef.get(model.spec.inputs[0])
                offset = coef["offset"]
            window = self._residuals.get(name)
            bias = sum(window) / len(window) if window else None
            figures[name] = _SensorFigures(s["rmse"], bias, gain, offset, int(s["updates"]))
        snap = _Snapshot(
            connected=connected, reconnects=reconnects, checkpoint_age=checkpoint_age,
            journal_age=journal_age, journal_records=journal_records, held=held,
            sensors_total=len(per), overflow=len(self._overflow),
            engine_counts=dict(stats["counts"]), sensors=figures,
        )
        with self._lock:
            self._snap = snap
            self.rejected = dict(rejected)

    # -- the endpoint ------------------------------------------------------------------------

    def start(self) -> None:
        """Import prometheus-client and serve ``/metrics`` on the configured address."""
        try:
            client = importlib.import_module("prometheus_client")
            registry_mod = importlib.import_module("prometheus_client.registry")
        except ImportError:
            raise ConfigError(
                "metrics.enabled = true needs prometheus-client, which is not installed: "
                "pip install 'trimtab[metrics]' (or set metrics.enabled = false)"
            ) from None
        registry = registry_mod.CollectorRegistry(auto_describe=False)
        registry.register(_Collector(self))
        client.ProcessCollector(registry=registry)
        app = client.make_wsgi_app(registry)
        host, port = self.settings.host, self.settings.port
        try:
            family = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)[0][0]
            server_class = type("_MetricsServer", (_Server,), {"address_family": family})
            self._server = make_server(host, port, app, server_class, handler_class=_QuietHandler)
        except OSError as exc:
            raise TransportError(
                f"metrics: cannot listen on {host}:{port} ({exc.strerror or exc}); "
                "change metrics.host / metrics.port"
            ) from exc
        self._thread = threading.Thread(target=self._server.serve_forever,
                                        name="trimtab-metrics", daemon=True)
        self._thread.start()

    @property
    def port(self) -> int | None:
        """The port actually bound (useful with port 0 in tests), or None before start."""
        return None if self._server is None else int(self._server.server_address[1])

    def stop(self) -> None:
        """Stop serving and release the port."""
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None
        if self._thread is not None:
            self._thread.join(5.0)
            self._thread = None

    def families(self) -> Iterator[Any]:
        """The metric families of the current snapshot (called on the HTTP thread)."""
        from prometheus_client.core import (
            CounterMetricFamily,
            GaugeMetricFamily,
            HistogramMetricFamily,
        )

        with self._lock:
            snap = self._snap
            received = dict(self.received)
            published = dict(self.published)
            rejected = dict(self.rejected)
            buckets, total = self.latency.cumulative()

        info = GaugeMetricFamily("trimtab_build_info", "Always 1; labels name the version.",
                                 labels=["version"])
        info.add_metric([__version__], 1.0)
        yield info
        yield _labelled(CounterMetricFamily, "trimtab_messages_received",
                        "MQTT messages taken off the queue, by outcome.", "outcome", received)
        yield _labelled(CounterMetricFamily, "trimtab_messages_rejected",
                        "Messages that failed decoding, by reason.", "reason", rejected)
        yield _labelled(CounterMetricFamily, "trimtab_messages_published",
                        "Corrected values handed to the MQTT client, by outcome.", "outcome",
                        published)
        counts = snap.engine_counts
        readings = {k.removeprefix("reading_"): v for k, v in counts.items()
                    if k.startswith("reading_")}
        yield _labelled(CounterMetricFamily, "trimtab_readings",
                        "Readings seen by the engine, by outcome.", "outcome", readings)
        refs = CounterMetricFamily("trimtab_references",
                                   "References per served sensor, by outcome and engine reason.",
                                   labels=["outcome", "reason"])
        for key, value in sorted(counts.items()):
            if key.startswith("reference_"):
                reason = key.removeprefix("reference_")
                refs.add_metric([reference_outcome(reason), reason], float(value))
        yield refs
        yield HistogramMetricFamily(
            "trimtab_processing_latency_seconds",
            "Seconds from receipt on the network thread to acknowledgement to the broker.",
            buckets=buckets, sum_value=total)
        yield GaugeMetricFamily("trimtab_mqtt_connected", "1 while connected to the broker.",
                                value=1.0 if snap.connected else 0.0)
        yield CounterMetricFamily("trimtab_mqtt_reconnects", "Reconnections since start.",
                                  value=float(snap.reconnects))
        yield GaugeMetricFamily("trimtab_checkpoint_age_seconds",
                                "Seconds since the last checkpoint was written.",
                                value=snap.checkpoint_age)
        yield GaugeMetricFamily("trimtab_journal_age_seconds",
                                "Age of the oldest journal record not yet in a checkpoint.",
                                value=snap.journal_age)
        yield GaugeMetricFamily("trimtab_journal_records",
                                "Journal records a restart would replay.",
                                value=float(snap.journal_records))
        yield GaugeMetricFamily("trimtab_held_events",
                                "Events held for incoming sensors until their state arrives.",
                                value=float(snap.held))
        yield GaugeMetricFamily("trimtab_sensors", "Sensors with state in the engine.",
                                value=float(snap.sensors_total))
        yield GaugeMetricFamily("trimtab_sensor_labels_overflow",
                                "Served sensors without per-sensor series "
                                "(beyond metrics.max_sensor_labels).", value=float(snap.overflow))
        yield from _sensor_families(snap.sensors)


def _labelled(kind: Any, name: str, doc: str, label: str, values: Mapping[str, int]) -> Any:
    fam = kind(name, doc, labels=[label])
    for key, value in sorted(values.items()):
        fam.add_metric([key], float(value))
    return fam


def _sensor_families(sensors: Mapping[str, _SensorFigures]) -> Iterator[Any]:
    from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

    docs = {
        "rmse": "Prequential RMSE of the corrected value against references (output units).",
        "bias": f"Mean corrected minus reference over the last {BIAS_WINDOW} paired references.",
        "gain": "Coefficient of the raw value, in output units per raw unit.",
        "offset": "Intercept in output units (corrected = offset + gain·raw + other terms).",
    }
    for attr, doc in docs.items():
        fam = GaugeMetricFamily(f"trimtab_sensor_{attr}", doc, labels=["sensor"])
        for name, fig in sorted(sensors.items()):
            value = getattr(fig, attr)
            if value is not None:
                fam.add_metric([name], float(value))
        yield fam
    updates = CounterMetricFamily("trimtab_sensor_updates",
                                  "References applied to the sensor's model.", labels=["sensor"])
    for name, fig in sorted(sensors.items()):
        updates.add_metric([name], float(fig.updates))
    yield updates


class _Collector:
    """Adapts :class:`Metrics` to prometheus-client's collector protocol."""

    def __init__(self, metrics: Metrics) -> None:
        self._metrics = metrics

    def collect(self) -> Iterator[Any]:
        return self._metrics.families()
