"""The MQTT transport: a paho-mqtt 2.x client with a persistent session and its own network loop.

What "nothing lost" takes with paho 2.x (config/README.md, "Nothing lost"): a fixed client id;
on MQTT 5 ``clean_start=False`` and a Session Expiry Interval > 0 on CONNECT (absent means 0);
on 3.1.1 ``clean_session=False``; QoS 1 subscriptions; and manual acknowledgement, so a message
is acknowledged only after the service has journaled and processed it — one that was received
but not yet handled when the process died is delivered again.

The network loop runs in one thread of ours (not ``loop_start``) so that reconnection uses
capped exponential backoff with jitter, reset after a successful connect. Callbacks run on
that thread: they hand messages on and return, and never raise.

The loop drives paho through its external-loop calls (``loop_read``, ``loop_write``,
``loop_misc`` around our own ``select``), never ``loop()``: ``loop()`` creates paho's wake-up
socket pair, and then every publish and acknowledgement made on the service's thread writes a
byte into it and wakes this thread once per packet. Instead the service queues a whole batch's
acknowledgements and values and calls :meth:`Transport.wake` once; the loop then writes them
all. A select timeout of ``POLL`` bounds the delay of anything queued without a wake-up.
"""

from __future__ import annotations

import contextlib
import select
import socket
import ssl
import threading
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from paho.mqtt.subscribeoptions import SubscribeOptions

from trimtab.errors import TransportError
from trimtab.logs import get_logger
from trimtab.service.endpoint import Backoff, Endpoint
from trimtab.service.outbox import PublishResult

if TYPE_CHECKING:
    pass

log = get_logger("trimtab.transport")

POLL = 0.05
"""Seconds the network loop waits in select at most (keepalive checks, the stop flag)."""

RECEIVE_MAXIMUM = 1000
"""Unacknowledged QoS 1 messages the broker may push to us; well below the service's queue."""

MessageHandler = Callable[[str, bytes, int, int], None]
"""Called on the network thread with (topic, payload, mid, qos); must return quickly."""
PublishedHandler = Callable[[int, "str | None"], None]
"""Called on the network thread with (mid, refusal reason or None) for each PUBACK."""


def _write_from_network_thread(client: mqtt.Client, userdata: Any, sock: Any) -> None:
    """paho's "register for writing" hook: nothing to do, our loop selects for writing."""


class Transport:
    """One MQTT connection, kept up by its own thread until :meth:`stop`."""

    def __init__(
        self,
        endpoint: Endpoint,
        subscriptions: Sequence[tuple[str, int]],
        on_message: MessageHandler,
        *,
        status_topic: str | None = None,
        on_connected: Callable[[], None] | None = None,
        unsubscribe: Sequence[str] = (),
        on_published: PublishedHandler | None = None,
    ) -> None:
        self.endpoint = endpoint
        self.subscriptions = list(subscriptions)
        # Filters an earlier run subscribed that this one does not want: a persistent session
        # keeps its subscriptions, so they are removed at every connect (harmless if gone).
        self.unsubscriptions = list(unsubscribe)
        self._handler = on_message
        self._on_connected = on_connected
        self._on_published = on_published
        self.server_receive_maximum: int | None = None
        """The broker's Receive Maximum from CONNACK (MQTT 5), if it sent one."""
        self.status_topic = status_topic
        self.connected = threading.Event()
        self.subscribed = threading.Event()
        self.reconnects = 0
        self.callback_errors = 0
        self._had_session = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._backoff = Backoff()
        self._sub_mids: set[int] = set()
        self._wake_r: socket.socket | None = None
        self._wake_w: socket.socket | None = None
        """The service's wake-up pair, made by :meth:`start` and closed by :meth:`stop`."""
        self._client = self._make_client()

    # -- set-up --------------------------------------------------------------------------------

    def _make_client(self) -> mqtt.Client:
        ep = self.endpoint
        v5 = ep.protocol == "5"
        client = mqtt.Client(
            CallbackAPIVersion.VERSION2,
            client_id=ep.client_id,
            protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311,
            clean_session=None if v5 else False,
            manual_ack=True,
        )
        if ep.username is not None:
            client.username_pw_set(ep.username, ep.password)
        if ep.tls:
            try:
                client.tls_set(
                    ca_certs=ep.ca_file, certfile=ep.cert_file, keyfile=ep.key_file,
                    cert_reqs=ssl.CERT_REQUIRED if ep.verify else ssl.CERT_NONE,
                )
            except (OSError, ssl.SSLError, ValueError) as exc:
                raise TransportError(f"broker.tls: cannot load certificates: {exc}") from exc
            client.tls_insecure_set(not ep.verify)
        if self.status_topic:
            client.will_set(self.status_topic, b"offline", qos=1, retain=True)
        client.max_queued_messages_set(0)
        # No in-flight limit in paho: the service's outbox keeps at most its window of QoS 1
        # publishes unacknowledged (see trimtab.service.outbox). A paho limit would make paho
        # scan all of its messages on every PUBACK, and its default of 20 caps throughput at 20
        # per round trip.
        client.max_inflight_messages_set(0)
        client.on_connect = self._on_connect
        client.on_publish = self._on_publish
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        # Only the network thread touches the socket. Without a write callback, paho writes
        # a publish or an acknowledgement made on the service's thread to the socket from
        # that thread, while the network thread may be reading it: harmless for plain TCP,
        # but a TLS connection's state is shared by both directions and breaks ("unspecified
        # error" disconnects, seen once the service published in bursts). With one set,
        # paho queues the packet and wakes the loop, which writes it.
        client.on_socket_register_write = _write_from_network_thread
        return client

    def _connect_properties(self) -> Properties | None:
        if self.endpoint.protocol != "5":
            return None
        props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
        props.SessionExpiryInterval = self.endpoint.session_expiry
        # Flow control (MQTT 5 Receive Maximum; absent means 65535): a broker that honours it
        # keeps a backlog in its own queue. Mosquitto 2.0.11 was seen here to exceed it once
        # acknowledgements flow; the service's bounded inbox then pushes back over TCP.
        props.ReceiveMaximum = RECEIVE_MAXIMUM
        return props

    # -- callbacks (network thread: hand on, never raise) ---------------------------------------

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: ReasonCode,
                    properties: Any) -> None:
        try:
            if reason.is_failure:
                log.warning("mqtt_connect_refused", reason=str(reason))
                return
            sock = client.socket()
            if isinstance(sock, socket.socket):
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._backoff.reset()
            receive_max = getattr(properties, "ReceiveMaximum", None)
            if isinstance(receive_max, int):
                self.server_receive_maximum = receive_max
            self.connected.set()
            session = bool(getattr(flags, "session_present", False))
            log.info("mqtt_connected", host=self.endpoint.host, port=self.endpoint.port,
                     session_present=session)
            if self._had_session and not session:
                # The broker forgot us (restarted without persistence, or the session expired):
                # what was published while we were away is gone. Say so; we resubscribe below.
                log.warning("mqtt_session_lost", host=self.endpoint.host, port=self.endpoint.port)
            self._had_session = True
            if self.unsubscriptions:
                client.unsubscribe(list(self.unsubscriptions))
            if self.subscriptions:
                if self.endpoint.protocol == "5":
                    opts = [(t, SubscribeOptions(qos=q)) for t, q in self.subscriptions]
                    _, mid = client.subscribe(opts)
                else:
                    _, mid = client.subscribe(list(self.subscriptions))
                if mid is not None:
                    self._sub_mids.add(mid)
            else:
                self.subscribed.set()
            if self.status_topic:
                client.publish(self.status_topic, b"online", qos=1, retain=True)
            if self._on_connected is not None:
                self._on_connected()
        except Exception:  # a callback must never raise: it would kill the network thread
            self.callback_errors += 1
            log.exception("mqtt_callback_failed", callback="on_connect")

    def _on_subscribe(self, client: mqtt.Client, userdata: Any, mid: int,
                      reasons: list[ReasonCode], properties: Any) -> None:
        try:
            bad = [str(r) for r in reasons if r.is_failure]
            if bad:
                log.error("mqtt_subscribe_refused", reasons=bad)
                return
            if mid in self._sub_mids:
                self._sub_mids.discard(mid)
                self.subscribed.set()
                log.info("mqtt_subscribed", topics=[t for t, _ in self.subscriptions])
        except Exception:
            self.callback_errors += 1
            log.exception("mqtt_callback_failed", callback="on_subscribe")

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: ReasonCode,
                       properties: Any) -> None:
        try:
            was = self.connected.is_set()
            self.connected.clear()
            self.subscribed.clear()
            if was and not self._stop.is_set():
                log.warning("mqtt_disconnected", reason=str(reason))
        except Exception:
            self.callback_errors += 1

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int, reason: ReasonCode,
                    properties: Any) -> None:
        try:
            if self._on_published is not None:
                failed = isinstance(reason, ReasonCode) and reason.is_failure
                self._on_published(mid, str(reason) if failed else None)
        except Exception:
            self.callback_errors += 1
            log.exception("mqtt_callback_failed", callback="on_publish")

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            self._handler(msg.topic, bytes(msg.payload), msg.mid, msg.qos)
        except Exception:
            self.callback_errors += 1
            log.exception("mqtt_callback_failed", callback="on_message", topic=msg.topic)

    # -- the network loop ----------------------------------------------------------------------

    def _attempt(self, first: bool) -> bool:
        ep = self.endpoint
        try:
            if first:
                kwargs: dict[str, Any] = {"keepalive": ep.keepalive}
                if ep.protocol == "5":
                    kwargs["clean_start"] = False
                    kwargs["properties"] = self._connect_properties()
                rc = self._client.connect(ep.host, ep.port, **kwargs)
            else:
                rc = self._client.reconnect()
        except (OSError, ssl.SSLError) as exc:
            log.warning("mqtt_connect_failed", host=ep.host, port=ep.port, error=str(exc))
            return False
        return rc == MQTTErrorCode.MQTT_ERR_SUCCESS

    def _run(self) -> None:
        first = True
        while not self._stop.is_set():
            if not self._attempt(first):
                self._stop.wait(self._backoff.next())
                continue
            if not first:
                self.reconnects += 1
            first = False
            while not self._stop.is_set():
                rc = self._step(POLL)
                if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                    self.connected.clear()
                    self.subscribed.clear()
                    break
            if not self._stop.is_set():
                self._stop.wait(self._backoff.next())

    def _step(self, timeout: float) -> MQTTErrorCode:
        """One turn of the network loop: wait for the socket or a wake-up, read, write, tick."""
        client = self._client
        sock = client.socket()
        if sock is None:
            return MQTTErrorCode.MQTT_ERR_NO_CONN
        # Bytes TLS has already decrypted do not show in select: read them without waiting.
        buffered = sock.pending() if isinstance(sock, ssl.SSLSocket) else 0
        writes = [sock] if client.want_write() else []
        waits = [sock] if self._wake_r is None else [sock, self._wake_r]
        try:
            readable, _, _ = select.select(waits, writes, [], 0.0 if buffered else timeout)
        except (OSError, ValueError, TypeError):  # the socket was closed under us
            return MQTTErrorCode.MQTT_ERR_CONN_LOST
        if self._wake_r is not None and self._wake_r in readable:
            with contextlib.suppress(BlockingIOError):
                while self._wake_r.recv(4096):
                    pass
        if sock in readable or buffered:
            rc = client.loop_read()
            if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                return rc
        if client.want_write():
            rc = client.loop_write()
            if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                return rc
        return client.loop_misc()

    def wake(self) -> None:
        """Have the network thread write what the service queued (thread-safe, never waits)."""
        wake = self._wake_w
        if wake is None or not self._client.want_write():
            return
        with contextlib.suppress(OSError):  # already woken (the pair is full), or closing
            wake.send(b"\0")

    def start(self) -> None:
        """Start the network thread; connecting happens there, with retries."""
        self._wake_r, self._wake_w = socket.socketpair()
        self._wake_r.setblocking(False)
        self._wake_w.setblocking(False)
        self._thread = threading.Thread(target=self._run, name="trimtab-mqtt", daemon=True)
        self._thread.start()

    def alive(self) -> bool:
        """Whether the network thread is running."""
        return self._thread is not None and self._thread.is_alive()

    # -- used from other threads ---------------------------------------------------------------

    def publish(self, topic: str, payload: bytes, qos: int = 0,
                retain: bool = False) -> mqtt.MQTTMessageInfo:
        """Queue a publish and wake the network thread (thread-safe); never waits."""
        info = self._client.publish(topic, payload, qos=qos, retain=retain)
        self.wake()
        return info

    def publish_value(self, topic: str, payload: bytes, qos: int) -> PublishResult:
        """Hand one corrected value to the client (thread-safe): its message id, or why not.

        At QoS ≥ 1 paho keeps a message made while disconnected and sends it after the next
        connect, so that counts as held; at QoS 0 it would be lost, so it is retried instead.
        It is written at the next :meth:`wake` (or within ``POLL``).
        """
        try:
            info = self._client.publish(topic, payload, qos=qos)
        except ValueError as exc:  # a topic or payload the protocol cannot carry
            return PublishResult(None, str(exc), retry=False)
        held = info.rc == MQTTErrorCode.MQTT_ERR_SUCCESS or (
            qos > 0 and info.rc == MQTTErrorCode.MQTT_ERR_NO_CONN)
        if held:
            return PublishResult(info.mid)
        return PublishResult(None, mqtt.error_string(info.rc), retry=True)

    def ack(self, mid: int, qos: int) -> None:
        """Acknowledge a QoS ≥ 1 message once it is journaled and processed (sent at the next
        :meth:`wake`, or within ``POLL``)."""
        if qos > 0:
            self._client.ack(mid, qos)

    def stop(self, *, offline: bool = True, timeout: float = 5.0) -> None:
        """Publish ``offline`` (retained), disconnect and join the network thread."""
        if offline and self.status_topic and self.connected.is_set():
            info = self._client.publish(self.status_topic, b"offline", qos=1, retain=True)
            # The network thread is still looping, so this wait completes without us.
            try:
                info.wait_for_publish(timeout)
            except (RuntimeError, ValueError):
                log.warning("status_offline_not_sent")
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        try:
            self._client.disconnect()
            self._client.loop(timeout=0.1)
        except (OSError, ValueError):
            pass
        for end in (self._wake_r, self._wake_w):
            if end is not None:
                end.close()
        self._wake_r = self._wake_w = None
