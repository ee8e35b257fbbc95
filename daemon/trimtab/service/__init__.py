"""The daemon: lifecycle, MQTT transport, outbox, metrics, systemd notify, shard hand-over."""
