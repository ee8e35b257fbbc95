"""Nothing gets in: TLS with verification, password and ACL, hostile sensor ids, file modes.

The CA and certificates are made here with the ``cryptography`` package, the broker's
password file with Mosquitto's own ``mosquitto_passwd``; the broker is a private Mosquitto on
a free loopback port with a TLS listener, ``allow_anonymous false`` and an ACL file.
"""

from __future__ import annotations

import datetime
import ipaddress
import json
import os
import re
import shutil
import stat
import subprocess
import threading
import time
import urllib.request
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import NameOID
from paho.mqtt.enums import CallbackAPIVersion
from prometheus_client.parser import text_string_to_metric_families

from trimtab.config import load_config
from trimtab.engine.wiring import make_codec, status_topic
from trimtab.errors import DecodeError
from trimtab.messages import Reading
from trimtab.wire.topics import TopicTemplate
from trimtab_sim.broker import PrivateBroker, free_port, mosquitto_path

from ..support import Daemon, Watcher, synthetic_stream, write_config

PASSWORD = "c0rrect-h0rse-Battery-st4ple"
TESTER_PASSWORD = "tester-only-pw"

# -- certificates ---------------------------------------------------------------------------------


def _name(cn: str) -> x509.Name:
    return x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn)])


def _write_key(path: Path, key: ec.EllipticCurvePrivateKey) -> None:
    path.write_bytes(key.private_bytes(serialization.Encoding.PEM,
                                       serialization.PrivateFormat.PKCS8,
                                       serialization.NoEncryption()))
    path.chmod(0o600)


def make_ca(directory: Path, name: str) -> tuple[Path, ec.EllipticCurvePrivateKey, x509.Name]:
    """A self-signed CA certificate (PEM) and its key."""
    key = ec.generate_private_key(ec.SECP256R1())
    now = datetime.datetime.now(datetime.UTC)
    cert = (x509.CertificateBuilder().subject_name(_name(name)).issuer_name(_name(name))
            .public_key(key.public_key()).serial_number(x509.random_serial_number())
            .not_valid_before(now - datetime.timedelta(minutes=5))
            .not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
            .add_extension(x509.KeyUsage(digital_signature=True, key_cert_sign=True,
                                         crl_sign=True, content_commitment=False,
                                         key_encipherment=False, data_encipherment=False,
                                         key_agreement=False, encipher_only=False,
                                         decipher_only=False), critical=True)
            .sign(key, hashes.SHA256()))
    path = directory / f"{name}.pem"
    path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    return path, key, cert.subject


def make_server_cert(directory: Path, ca_key: ec.EllipticCurvePrivateKey,
                     ca_name: x509.Name) -> tuple[Path, Path]:
    """A server certificate for 127.0.0.1 and localhost, signed by the CA; and its key."""
    key = ec.generate_private_key(ec.SECP256R1())
    now = datetime.datetime.now(datetime.UTC)
    san = x509.SubjectAlternativeName([x509.DNSName("localhost"),
                                       x509.IPAddress(ipaddress.ip_address("127.0.0.1"))])
    cert = (x509.CertificateBuilder().subject_name(_name("localhost")).issuer_name(ca_name)
            .public_key(key.public_key()).serial_number(x509.random_serial_number())
            .not_valid_before(now - datetime.timedelta(minutes=5))
            .not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(san, critical=False)
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .sign(ca_key, hashes.SHA256()))
    cert_path, key_path = directory / "server.pem", directory / "server.key"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    _write_key(key_path, key)
    return cert_path, key_path


class SecureBroker(PrivateBroker):
    """A private Mosquitto with only a TLS listener, password authentication and an ACL."""

    def __init__(self, workdir: Path, *, ca: Path, cert: Path, key: Path, passwords: Path,
                 acl: Path) -> None:
        super().__init__(workdir)
        self.tls_files = (ca, cert, key)
        self.passwords = passwords
        self.acl = acl

    def _write_config(self) -> None:
        ca, cert, key = self.tls_files
        lines = [
            f"listener {self.port} 127.0.0.1",
            f"cafile {ca}", f"certfile {cert}", f"keyfile {key}",
            "tls_version tlsv1.2",
            "allow_anonymous false",
            f"password_file {self.passwords}",
            f"acl_file {self.acl}",
            "persistence false",
            f"log_dest file {self.log_path}",
            "log_type error", "log_type warning", "log_type notice",
        ]
        if os.geteuid() == 0:
            lines.append("user root")  # see PrivateBroker: else the log cannot be written
        self.conf_path.write_text("\n".join(lines) + "\n")


@pytest.fixture
def secure(tmp_path: Path) -> Any:
    """A TLS + password + ACL broker, the CA that signed it and a CA that did not."""
    if mosquitto_path() is None or shutil.which("mosquitto_passwd") is None:
        pytest.skip("mosquitto or mosquitto_passwd not found on PATH")
    pki = tmp_path / "pki"
    pki.mkdir()
    ca, ca_key, ca_name = make_ca(pki, "test-ca")
    other_ca, _, _ = make_ca(pki, "other-ca")
    cert, key = make_server_cert(pki, ca_key, ca_name)
    passwords = pki / "passwords"
    for user, pw in (("trimtab", PASSWORD), ("tester", TESTER_PASSWORD)):
        subprocess.run(["mosquitto_passwd", "-b", *([] if passwords.exists() else ["-c"]),
                        str(passwords), user, pw], check=True, capture_output=True)
    acl = pki / "acl"
    acl.write_text("user trimtab\ntopic readwrite t/#\ntopic readwrite trimtab-test/#\n\n"
                   "user tester\ntopic readwrite #\n")
    broker = SecureBroker(tmp_path / "broker", ca=ca, cert=cert, key=key, passwords=passwords,
                          acl=acl).start()
    try:
        yield broker, ca, other_ca
    finally:
        broker.kill()


def _secure_config(tmp_path: Path, port: int, ca: Path, password: str) -> Path:
    secret = tmp_path / "mqtt-password"
    secret.write_text(password + "\n")
    secret.chmod(0o600)
    path = write_config(tmp_path / "d", port, extra=f'\n[broker.tls]\nenabled = true\n'
                        f'ca_file = "{ca}"\nverify = true\n')
    text = path.read_text().replace(
        'client_id = "trimtab-test"',
        f'client_id = "trimtab-test"\nusername = "trimtab"\npassword_file = "{secret}"')
    path.write_text(text)
    return path


def _tester(port: int, ca: Path) -> mqtt.Client:
    """A connected TLS client with the tester's credentials (sees every topic)."""
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"tester-{time.monotonic_ns()}")
    client.tls_set(ca_certs=str(ca))
    client.username_pw_set("tester", TESTER_PASSWORD)
    ok = threading.Event()
    client.on_connect = lambda c, u, f, rc, p: ok.set() if not rc.is_failure else None
    client.connect("127.0.0.1", port)
    client.loop_start()
    assert ok.wait(10), "tester could not connect"
    return client


def _wait_log(daemon: Daemon, needle: str, count: int = 1, timeout: float = 20.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if daemon.log().count(needle) >= count:
            return True
        time.sleep(0.1)
    return False


class TestTlsAndPassword:
    def test_verified_tls_with_password_and_acl_works(self, tmp_path: Path, secure: Any) -> None:
        """With the right CA and password the daemon connects, verifies and corrects readings."""
        broker, ca, _ = secure
        cfg_path = _secure_config(tmp_path, broker.port, ca, PASSWORD)
        cfg = load_config(cfg_path)
        codec = make_codec(cfg)
        tester = _tester(broker.port, ca)
        got: list[bytes] = []
        online = threading.Event()

        def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
            if msg.topic == status_topic(cfg) and msg.payload == b"online":
                online.set()
            elif msg.topic.endswith("/corrected"):
                got.append(msg.payload)

        tester.on_message = on_message
        tester.subscribe([(status_topic(cfg), 1), ("t/+/corrected", 1)])
        daemon = Daemon(cfg_path, tmp_path / "daemon.log").start()
        events = [e for e in synthetic_stream(30) if isinstance(e, Reading)]
        try:
            assert online.wait(20), daemon.log()
            for e in events:
                tester.publish(f"t/{e.sensor}/raw", codec.encode_reading(e), qos=1)
            deadline = time.monotonic() + 20
            while len(got) < len(events) and time.monotonic() < deadline:
                time.sleep(0.05)
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            tester.disconnect()
            tester.loop_stop()
        keys = sorted((v["sensor"], v["t"]) for v in map(json.loads, got))
        assert keys == sorted((e.sensor, e.t) for e in events), keys
        assert PASSWORD not in daemon.log()
        assert "mqtt_connected" in daemon.log()

    def test_wrong_ca_is_refused_with_a_clear_error_and_retried(self, tmp_path: Path,
                                                                 secure: Any) -> None:
        """A CA that did not sign the broker: verification fails, logged; the daemon retries."""
        broker, _, other_ca = secure
        daemon = Daemon(_secure_config(tmp_path, broker.port, other_ca, PASSWORD),
                        tmp_path / "daemon.log").start()
        try:
            assert _wait_log(daemon, '"mqtt_connect_failed"', count=3), daemon.log()
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
        log = daemon.log()
        failures = [json.loads(x) for x in log.splitlines()
                    if x.startswith("{") and '"mqtt_connect_failed"' in x]
        assert all("CERTIFICATE_VERIFY_FAILED" in f["error"] for f in failures), failures
        assert "mqtt_connected" not in log
        assert PASSWORD not in log

    def test_wrong_password_is_refused_with_a_clear_error_and_retried(self, tmp_path: Path,
                                                                       secure: Any) -> None:
        """A wrong password: the broker's refusal is logged; retried; no password in the log."""
        broker, ca, _ = secure
        wrong = "not-the-" + PASSWORD
        daemon = Daemon(_secure_config(tmp_path, broker.port, ca, wrong),
                        tmp_path / "daemon.log").start()
        try:
            assert _wait_log(daemon, '"mqtt_connect_refused"', count=2), daemon.log()
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
        log = daemon.log()
        refusals = [json.loads(x) for x in log.splitlines()
                    if x.startswith("{") and '"mqtt_connect_refused"' in x]
        assert all(r["reason"] in ("Not authorized", "Bad user name or password")
                   for r in refusals), refusals
        assert wrong not in log and PASSWORD not in log


HOSTILE_TOPIC_IDS = ["..", "..%2F..%2Fetc", "a" * 65, "a" * 5000, ".hidden", "-rf", "a b",
                     "ü", "s1..x", "s1\\x", "%00"]
HOSTILE_DECODER_IDS = ["../x", "a/b", "+", "#", "s\x01", "s\n", "s\x7f", "", " s", "s\t"]


def _sensor_labels(port: int) -> set[str]:
    """Every value of a ``sensor`` label on the metrics endpoint."""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as resp:
        text = resp.read().decode("utf-8")
    return {s.labels["sensor"] for fam in text_string_to_metric_families(text)
            for s in fam.samples if "sensor" in s.labels}


class TestHostileSensorIds:
    @pytest.mark.parametrize("sensor", HOSTILE_TOPIC_IDS + HOSTILE_DECODER_IDS)
    def test_topic_never_yields_a_hostile_id(self, sensor: str) -> None:
        """Every hostile id in a reading topic is refused as bad_sensor_id or does not match."""
        template = TopicTemplate("t/{sensor}/raw")
        try:
            got = template.match(f"t/{sensor}/raw")
        except DecodeError as exc:
            assert exc.reason == "bad_sensor_id"
        else:
            assert got is None  # e.g. 'a/b' has more levels than the template

    def test_hostile_ids_reach_no_file_name_and_no_metric_label(self, tmp_path: Path,
                                                               broker: PrivateBroker) -> None:
        """Hostile ids over MQTT are rejected; the state dir and metric labels hold good ids."""
        metrics_port = free_port()
        path = write_config(tmp_path / "d", broker.port,
                            extra=f"\n[metrics]\nenabled = true\nport = {metrics_port}\n")
        path.write_text(path.read_text().replace('ids = ["s1", "s2"]',
                                                 'ids = ["s1", "s2"]\npattern = ".*"'))
        cfg = load_config(path)
        codec = make_codec(cfg)
        daemon = Daemon(path, tmp_path / "daemon.log").start()
        watcher = Watcher(broker.port, status_topic(cfg))
        client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="hostile")
        client.connect("127.0.0.1", broker.port)
        client.loop_start()
        good = Reading(1_767_225_600.0, "x", {"raw": 40.0, "temp": 20.0})
        try:
            assert watcher.wait_online(), daemon.log()
            for sensor in [*HOSTILE_TOPIC_IDS, "ok-1"]:
                client.publish(f"t/{sensor}/raw", codec.encode_reading(good), qos=1) \
                    .wait_for_publish(10)
            assert watcher.wait_for(lambda w: "ok-1" in (w.stats or {}).get("sensors", {})
                                    and sum((w.stats or {}).get("rejected", {}).values())
                                    >= len(HOSTILE_TOPIC_IDS), timeout=30), watcher.stats
            stats = watcher.stats or {}
            deadline = time.monotonic() + 20  # per-sensor series refresh every few seconds
            while True:
                labels = _sensor_labels(metrics_port)
                if "ok-1" in labels or time.monotonic() > deadline:
                    break
                time.sleep(0.2)
            assert daemon.terminate() == 0
        finally:
            client.disconnect()
            client.loop_stop()
            daemon.kill9()
            watcher.close()
        assert stats["rejected"] == {"bad_sensor_id": len(HOSTILE_TOPIC_IDS)}
        assert sorted(stats["sensors"]) == ["ok-1"]
        assert labels <= {"s1", "s2", "ok-1"} and "ok-1" in labels
        names = [p.name for p in Path(cfg.state.dir).iterdir()]
        # fixed names, none from an id
        allowed = re.compile(r"store\.lock|checkpoint-\d{8,}\.json|journal-\d{8,}\.log"
                             r"|subscriptions\.json|held\.log|outbox\.mark")
        assert all(allowed.fullmatch(n) for n in names), names


class TestFileModes:
    def test_state_is_owner_only(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """The state directory is 0700 and every file the daemon writes in it is 0600."""
        path = write_config(tmp_path / "d", broker.port)
        cfg = load_config(path)
        old = os.umask(0o022)  # a permissive umask, as on many gateways; the child inherits it
        try:
            daemon = Daemon(path, tmp_path / "daemon.log").start()
        finally:
            os.umask(old)
        watcher = Watcher(broker.port, status_topic(cfg))
        client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="modes")
        client.connect("127.0.0.1", broker.port)
        client.loop_start()
        codec = make_codec(cfg)
        try:
            assert watcher.wait_online(), daemon.log()
            for e in synthetic_stream(30):
                topic = f"t/{e.sensor}/{'raw' if isinstance(e, Reading) else 'ref'}"
                payload = (codec.encode_reading(e) if isinstance(e, Reading)
                           else codec.encode_reference(e))
                client.publish(topic, payload, qos=1).wait_for_publish(10)
            time.sleep(1.2)  # more than checkpoint_every: a checkpoint and a new journal exist
            assert daemon.terminate() == 0
        finally:
            client.disconnect()
            client.loop_stop()
            daemon.kill9()
            watcher.close()
        state = Path(cfg.state.dir)
        assert stat.S_IMODE(state.stat().st_mode) == 0o700
        files = list(state.iterdir())
        assert any(p.name.startswith("checkpoint-") for p in files)
        assert any(p.name.startswith("journal-") for p in files)
        modes = {p.name: stat.S_IMODE(p.stat().st_mode) for p in files}
        assert all(m == 0o600 for m in modes.values()), modes

    def test_subscription_ledger_is_owner_only(self, tmp_path: Path) -> None:
        """The subscription ledger beside the state is written 0600 like the rest."""
        from trimtab.service.shards import SubscriptionLedger

        old = os.umask(0o022)
        try:
            SubscriptionLedger(tmp_path).write(["t/+/raw"])
        finally:
            os.umask(old)
        assert stat.S_IMODE((tmp_path / "subscriptions.json").stat().st_mode) == 0o600
