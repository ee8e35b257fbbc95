"""Hostile input at every decoder: never an unhandled exception, every rejection with a reason.

Hypothesis feeds each decoder a mix of raw bytes, JSON built from the fields the decoder
knows (so the fuzz reaches past the parser), and valid inputs with random damage (bytes cut,
flipped, inserted, deleted; leaves of a parsed document replaced). The number of inputs per
decoder is the soak scale's ``fuzz_inputs`` (small in CI, 100,000 under ``make soak``); each
test counts the inputs it really ran and reports the count as a soak figure.
"""

from __future__ import annotations

import copy
import json
import math
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trimtab.config import load_config, parse_config
from trimtab.engine.wiring import make_engine
from trimtab.errors import ConfigError, DataError, DecodeError, StateError, TrimtabError
from trimtab.messages import Reading, Reference
from trimtab.store.checkpoint import decode_checkpoint, encode_checkpoint
from trimtab.store.journal import encode_record, scan_journal
from trimtab.store.modelfile import document_model, load_model_file, model_document
from trimtab.store.records import record_to_event
from trimtab.wire import codec as codec_mod
from trimtab.wire import streamfile
from trimtab.wire.codec import JsonCodec, SenmlCodec
from trimtab_sim.soak import current_scale, record

SCALE = current_scale()
FIELDS = ["t", "raw", "temp", "rh", "value", "window", "sensor", "reading", "reference", "truth",
          "bn", "bt", "bu", "bv", "bver", "n", "u", "v", "vs", "vb", "vd", "s", "ut", "format",
          "version", "model", "fit", "theta", "spec", "scaler", "centre", "scale", "inputs"]
T0 = 1_767_225_600.0

# -- strategies -----------------------------------------------------------------------------------

scalars = (st.none() | st.booleans() | st.integers(-(2**70), 2**70)
           | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=12)
           | st.sampled_from([T0, "2026-01-01T00:00:00Z", "2026-01-01T00:00:00", 0.0, -1.0,
                              1e308, 2.0**28, "s1", "../etc", "a" * 70, "s\x01"]))
json_values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=5)
    | st.dictionaries(st.sampled_from(FIELDS) | st.text(max_size=6), inner, max_size=7),
    max_leaves=12,
)
small_values = scalars | st.lists(scalars, max_size=3) | st.dictionaries(
    st.sampled_from(FIELDS), scalars, max_size=3)
"""Replacement leaves: cheap to draw, which keeps 100,000 inputs a decoder affordable."""


def json_bytes(values: st.SearchStrategy[Any] = json_values) -> st.SearchStrategy[bytes]:
    """JSON text (NaN and Infinity literals included) of generated values."""
    return values.map(lambda v: json.dumps(v, allow_nan=True).encode("utf-8"))


def damaged(seeds: list[bytes]) -> st.SearchStrategy[bytes]:
    """A seed with up to six random edits: flip, cut short, insert or delete bytes."""
    edit = st.tuples(st.sampled_from(["flip", "cut", "insert", "delete"]),
                     st.integers(0, 1 << 16), st.binary(min_size=1, max_size=4))

    def apply(seed: bytes, edits: list[tuple[str, int, bytes]]) -> bytes:
        data = bytearray(seed)
        for kind, pos, chunk in edits:
            at = pos % (len(data) + 1)
            if kind == "flip" and data:
                data[at % len(data)] ^= chunk[0] or 1
            elif kind == "cut":
                del data[at:]
            elif kind == "insert":
                data[at:at] = chunk
            else:
                del data[at:at + len(chunk)]
        return bytes(data)

    return st.builds(apply, st.sampled_from(seeds), st.lists(edit, min_size=1, max_size=6))


def inputs(seeds: list[bytes]) -> st.SearchStrategy[bytes]:
    return st.one_of(st.binary(max_size=200), json_bytes(), damaged(seeds))


def mutated_document(doc: Any) -> st.SearchStrategy[Any]:
    """A parsed document with up to four leaves (or whole branches) replaced or removed."""

    def paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        out = [prefix]
        if isinstance(node, dict):
            for k, v in node.items():
                out += paths(v, (*prefix, k))
        elif isinstance(node, list):
            for i, v in enumerate(node):
                out += paths(v, (*prefix, i))
        return out

    every = paths(doc)[1:]

    def apply(edits: list[tuple[tuple[Any, ...], Any, bool]]) -> Any:
        new = copy.deepcopy(doc)
        for path, value, remove in edits:
            parent = new
            try:
                for key in path[:-1]:
                    parent = parent[key]
                if remove and isinstance(parent, dict):
                    parent.pop(path[-1], None)
                else:
                    parent[path[-1]] = value
            except (KeyError, IndexError, TypeError):
                continue  # an earlier edit removed or replaced this path
        return new

    edit = st.tuples(st.sampled_from(every), small_values, st.booleans())
    return st.lists(edit, min_size=1, max_size=4).map(apply)


# -- checks -----------------------------------------------------------------------------------


def reasoned(exc: DecodeError, reasons: frozenset[str]) -> None:
    """A decode rejection carries a known reason and a non-empty detail."""
    assert exc.reason in reasons, exc.reason
    assert exc.detail, exc.reason


BATCH = 8
"""Inputs per Hypothesis example: Hypothesis's own cost per example is shared by eight."""


def run(name: str, strategy: st.SearchStrategy[Any], check: Callable[[Any], None]) -> int:
    """Run ``check`` on the scale's number of inputs; report and return how many ran."""
    seen = [0]

    @settings(max_examples=-(-SCALE.fuzz_inputs // BATCH), deadline=None, database=None,
              suppress_health_check=list(HealthCheck))
    @given(st.lists(strategy, min_size=BATCH, max_size=BATCH))
    def body(batch: list[Any]) -> None:
        for x in batch:
            seen[0] += 1
            check(x)

    body()
    assert seen[0] >= SCALE.fuzz_inputs
    record(f"fuzz inputs: {name}", seen[0], "inputs")
    record("fuzz inputs (all decoders)", seen[0], "inputs")
    return seen[0]


def _seeds_json() -> list[bytes]:
    return [b'{"t": 1767225600.0, "raw": 41.2, "temp": 21.4, "rh": 55}',
            b'{"t": "2026-01-01T00:00:00Z", "value": 38.9, "window": 3600}']


def _seeds_senml() -> list[bytes]:
    c = SenmlCodec(covariates={"temp": "temp"})
    return [c.encode_reading(Reading(T0, "s1", {"raw": 41.2, "temp": 21.4})),
            c.encode_reference(Reference(T0, "s1", 38.9, 3600.0)),
            b'[{"bn": "s1:", "bt": 1767225600, "bver": 10, "n": "raw", "v": 1, "u": "ug/m3"},'
            b' {"n": "temp", "v": 20, "t": 0}]']


class TestPayloadCodecs:
    def test_flat_json(self) -> None:
        """Flat JSON readings and references: a Reading/Reference or a reasoned DecodeError."""
        codec = JsonCodec(covariates={"temp": "temp", "rh": "rh"})

        def check(payload: bytes) -> None:
            for decode in (codec.decode_reading, codec.decode_reference):
                try:
                    event = decode("s1", payload)
                except DecodeError as exc:
                    reasoned(exc, codec_mod.REASONS)
                    continue
                assert math.isfinite(event.t)

        run("flat JSON payloads", inputs(_seeds_json()), check)

    def test_senml(self) -> None:
        """SenML packs (RFC 8428): a Reading/Reference or a reasoned DecodeError."""
        codec = SenmlCodec(covariates={"temp": "temp"})

        def check(payload: bytes) -> None:
            for decode in (codec.decode_reading, codec.decode_reference):
                try:
                    event = decode("s1", payload)
                except DecodeError as exc:
                    reasoned(exc, codec_mod.REASONS)
                    continue
                assert math.isfinite(event.t)

        run("SenML payloads", inputs(_seeds_senml()), check)


class TestStreamFiles:
    def test_stream_lines(self) -> None:
        """Stream-file lines: an event or a reasoned DecodeError; files name file:line."""
        seeds = [streamfile.encode_event(Reading(T0, "s1", {"raw": 41.2, "temp": 2.0}, 40.0))
                 .encode(), streamfile.encode_event(Reference(T0, "s1", 38.9, 60.0)).encode()]

        def check(data: bytes) -> None:
            line = data.decode("utf-8", "replace")
            try:
                streamfile.decode_event(line)
            except DecodeError as exc:
                reasoned(exc, streamfile.REASONS)

        run("stream-file lines", inputs(seeds), check)

    def test_stream_files(self, tmp_path: Path) -> None:
        """Whole stream files: events, or DataError('file:line: reason: detail')."""
        seeds = [b"\n".join(s for s in (
            streamfile.encode_event(Reading(T0 + i, "s1", {"raw": 1.0 + i})).encode()
            for i in range(3)))]
        path = tmp_path / "stream.jsonl"

        def check(data: bytes) -> None:
            path.write_bytes(data)
            try:
                list(streamfile.read_events(path))
            except DataError as exc:
                head, _, rest = str(exc).partition(": ")
                assert head.startswith(f"{path}:") and rest.split(":")[0] in streamfile.REASONS

        run("stream files", st.one_of(inputs(seeds), st.lists(json_bytes(), max_size=4).map(
            b"\n".join)), check)


def _config_doc() -> dict[str, Any]:
    return {
        "broker": {"host": "127.0.0.1", "port": 1883, "client_id": "fuzz", "keepalive": 10,
                   "tls": {"enabled": False}},
        "topics": {"readings": "t/{sensor}/raw", "references": "t/{sensor}/ref",
                   "corrected": "t/{sensor}/out", "status": "st/{client_id}", "qos": 1},
        "payload": {"covariates": {"temp": "temp"}, "max_bytes": 4096},
        "sensors": {"ids": ["s1", "s2"], "defaults": {"inputs": ["raw", "temp"]},
                    "overrides": {"s2": {"squares": ["temp"]}}},
        "learning": {"alpha": 0.1, "alpha_max": 0.5, "memory": 100, "lambda": 1.0},
        "pairing": {"tolerance": 30.0, "buffer_span": 3600.0},
        "state": {"dir": "/tmp/fuzz-state", "checkpoint_every": 5.0},
    }


def _config_lines_ok(exc: ConfigError, source: str) -> None:
    assert exc.errors
    for line in exc.errors:
        assert line.startswith(f"{source}: ") and len(line) > len(source) + 2, line


class TestConfigs:
    def test_config_documents(self) -> None:
        """Parsed config documents with damaged leaves: a Config or ConfigError lines with paths."""
        doc = _config_doc()
        parse_config(doc, "fuzz.toml")  # the seed itself is valid

        def check(d: Any) -> None:
            try:
                parse_config(d, "fuzz.toml")
            except ConfigError as exc:
                _config_lines_ok(exc, "fuzz.toml")

        run("config documents", mutated_document(doc), check)

    def test_config_files(self, tmp_path: Path) -> None:
        """TOML files with damaged bytes: a Config or ConfigError naming the file."""
        seed = Path(__file__).resolve().parents[2] / "config" / "gateway.toml"
        seeds = [seed.read_bytes()[:3000], b'[broker]\nclient_id = "x"\n[sensors]\nids = ["a"]\n']
        path = tmp_path / "fuzz.toml"

        def check(data: bytes) -> None:
            path.write_bytes(data)
            try:
                load_config(path)
            except ConfigError as exc:
                _config_lines_ok(exc, str(path))

        run("config files", st.one_of(st.binary(max_size=200), damaged(seeds)), check)


def _model_doc() -> dict[str, Any]:
    cfg = parse_config({"broker": {"client_id": "fuzz"}, "sensors": {
        "ids": ["s1"], "defaults": {"inputs": ["raw"], "centre": {"raw": 40.0},
                                    "scale": {"raw": 10.0}}}, "learning": {"warmup": 1}})
    engine = make_engine(cfg)
    for i in range(20):
        engine.process(Reading(T0 + 60 * i, "s1", {"raw": 30.0 + i}))
        engine.process(Reference(T0 + 60 * i, "s1", 25.0 + i))
    model = engine.model("s1")
    assert model is not None and model.updates > 0
    return model_document(model, "s1")


class TestModelFiles:
    def test_model_documents(self) -> None:
        """Model-state documents with damaged leaves: a model or DataError naming the key."""
        doc = _model_doc()
        document_model(doc, "m.json")

        def check(d: Any) -> None:
            try:
                document_model(d, "m.json")
            except DataError as exc:
                assert str(exc).startswith("m.json: ") and len(str(exc)) > 10

        run("model-state documents", mutated_document(doc), check)

    def test_model_files(self, tmp_path: Path) -> None:
        """Model-state files with damaged bytes: a model or DataError naming the file."""
        seed = json.dumps(_model_doc(), indent=2).encode()
        path = tmp_path / "m.json"

        def check(data: bytes) -> None:
            path.write_bytes(data)
            try:
                load_model_file(path)
            except DataError as exc:
                assert str(exc).startswith(f"{path}"), str(exc)

        run("model-state files", st.one_of(st.binary(max_size=200), damaged([seed])), check)


def _crc_line(value: Any) -> bytes:
    """A journal line with a correct checksum around any JSON (what a buggy writer could do)."""
    payload = json.dumps(value, allow_nan=True, separators=(",", ":")).encode()
    return b"%08x %s\n" % (zlib.crc32(payload), payload)


class TestJournalAndCheckpoint:
    def test_journal(self) -> None:
        """Journal bytes: records and a torn tail, or StateError naming file and line."""
        good = b"".join(encode_record({"t": T0 + i, "sensor": "s1", "reading": {"raw": 1.0}})
                        for i in range(3))
        good += encode_record({"t": T0 + 9, "sensor": "s1", "reference": 2.0, "window": 60.0})
        where = Path("/state/journal-00000001.log")
        checksummed = st.lists(small_values.map(_crc_line), min_size=1, max_size=3).map(
            b"".join)

        def check(data: bytes) -> None:
            try:
                records, tail = scan_journal(data, where)
            except StateError as exc:
                assert str(exc).startswith(f"journal {where}: line "), str(exc)
                return
            assert tail.good_bytes + tail.torn_bytes == len(data)
            for rec in records:
                try:
                    record_to_event(rec)
                except StateError as exc:
                    assert "wrong shape" in str(exc)

        run("journal", st.one_of(inputs([good]), checksummed), check)

    def test_journal_record_with_a_huge_integer(self) -> None:
        """A checksummed journal record whose time is a 400-digit integer is a StateError."""
        records, _ = scan_journal(_crc_line({"t": 10**400, "sensor": "s1", "reference": 1.0}),
                                  Path("/state/journal-00000001.log"))
        with pytest.raises(StateError):
            record_to_event(records[0])

    def test_checkpoint(self) -> None:
        """Checkpoint bytes: the state or ValueError saying why; odd states load or refuse."""
        cfg = parse_config({"broker": {"client_id": "fuzz"}, "sensors": {
            "ids": ["s1"], "defaults": {"inputs": ["raw"], "centre": {"raw": 40.0},
                                        "scale": {"raw": 10.0}}}})
        engine = make_engine(cfg)
        for i in range(12):
            engine.process(Reading(T0 + 60 * i, "s1", {"raw": 30.0 + i}))
            engine.process(Reference(T0 + 60 * i, "s1", 25.0 + i))
        state = engine.state_dict()
        seed = encode_checkpoint(state, 3)

        def check(x: Any) -> None:
            if isinstance(x, bytes):
                try:
                    decode_checkpoint(x, 3)
                except StateError as exc:
                    assert str(exc)
                return
            try:  # a state that passed its checksum but is not what this build writes
                make_engine(cfg).load_state(x)
            except TrimtabError as exc:
                assert isinstance(exc, StateError | DataError) and str(exc)

        run("checkpoints", st.one_of(damaged([seed]), mutated_document(state)), check)
