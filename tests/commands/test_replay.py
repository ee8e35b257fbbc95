"""`trimtab replay` summary: readable lines, --json for machines, exit 2 when nothing is usable."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from trimtab.cli import main
from trimtab.messages import Reading
from trimtab.wire.streamfile import write_events

from ..support import synthetic_stream, write_config


class TestReplaySummary:
    def test_every_line_rejected_exits_2_with_readable_counts(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """A stream whose every line is rejected exits 2; the counts read as words, not a dict."""
        conf = write_config(tmp_path, 1)
        stream = tmp_path / "bad.jsonl"
        stream.write_text("not json\n" * 3 + '{"t": 1, "sensor": "s1"}\n')
        assert main(["replay", "-c", str(conf), str(stream), "-o", str(tmp_path / "o")]) == 2
        err = capsys.readouterr().err
        assert err == (f"trimtab replay: {stream}: no usable events: all 4 lines rejected "
                       "(3 bad_json, 1 missing_field); first at line 1: bad_json: "
                       "Expecting value: line 1 column 1 (char 0)\n")

    def test_partial_rejection_is_summarised_in_words(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """Good events with a few bad lines: exit 0, rejected lines counted in words."""
        conf = write_config(tmp_path, 1)
        stream = tmp_path / "s.jsonl"
        write_events(stream, synthetic_stream(50))
        with stream.open("a") as fh:
            fh.write("oops\n")
        assert main(["replay", "-c", str(conf), str(stream), "-o", str(tmp_path / "o")]) == 0
        err = capsys.readouterr().err.splitlines()
        assert err[1].startswith("replay: readings: 100 accepted; references: ")
        assert "{" not in err[1]
        lines = len(stream.read_text().splitlines())
        assert err[2] == f"replay: rejected lines: 1 bad_json (first at line {lines}: " \
                         "bad_json: Expecting value: line 1 column 1 (char 0))"

    def test_json_summary(self, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
        """--json writes the summary as one JSON object whose counts match the stream."""
        conf = write_config(tmp_path, 1)
        stream = tmp_path / "s.jsonl"
        events = list(synthetic_stream(50))
        write_events(stream, events)
        out = tmp_path / "o.jsonl"
        assert main(["replay", "-c", str(conf), str(stream), "-o", str(out), "--json"]) == 0
        summary = json.loads(capsys.readouterr().err)
        assert summary["events"] == len(events)
        assert summary["corrected"] == len(out.read_text().splitlines())
        assert summary["rejected_lines"] == {}
        assert summary["readings"] == {"accepted": summary["corrected"]}
        assert sum(summary["references"].values()) > 0

    def test_nothing_corrected_exits_2_with_the_reasons(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """Events that give no corrected value (inputs the config lacks) exit 2 and say why."""
        conf = write_config(tmp_path, 1)
        stream = tmp_path / "s.jsonl"
        stream.write_text('{"t": 1767225600.0, "sensor": "s1", "reading": {"raw": 1.0}}\n')
        assert main(["replay", "-c", str(conf), str(stream), "-o", str(tmp_path / "o")]) == 2
        err = capsys.readouterr().err
        assert err == (f"trimtab replay: {stream}: no corrected values from 1 events (readings: "
                       f"1 missing_input; references: none); check its sensors and inputs "
                       f"against {conf}\n")


class TestReplayCsv:
    def test_csv_with_a_layout_replays_like_its_converted_stream(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """`replay DATA.csv --layout L.toml` gives what replaying `convert`'s output gives."""
        conf = write_config(tmp_path, 1)
        events = [e for e in synthetic_stream(60) if e.sensor == "s1"]
        rows = ["when;raw;temp;ref"]
        for e in events:
            if isinstance(e, Reading):
                rows.append(f"{e.t!r};{e.inputs['raw']!r};{e.inputs['temp']!r};")
            else:
                rows.append(f"{e.t!r};;;{e.value!r}")
        csv = tmp_path / "s1.csv"
        csv.write_text("\n".join(rows) + "\n")
        layout = tmp_path / "layout.toml"
        layout.write_text('[csv]\ntime = "when"\nsensor = "s1"\nreference = "ref"\n'
                          '[csv.inputs]\nraw = "raw"\ntemp = "temp"\n')
        direct, converted = tmp_path / "a.jsonl", tmp_path / "b.jsonl"
        assert main(["replay", "-c", str(conf), str(csv), "--layout", str(layout),
                     "-o", str(direct), "--quiet"]) == 0
        stream = tmp_path / "s1.jsonl"
        assert main(["convert", str(csv), "--layout", str(layout), "-o", str(stream),
                     "--quiet"]) == 0
        assert main(["replay", "-c", str(conf), str(stream), "-o", str(converted),
                     "--quiet"]) == 0
        assert direct.read_text() == converted.read_text() != ""

    def test_csv_without_a_layout_is_one_line(self, tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
        """A .csv stream without --layout says what is needed, exit 2."""
        conf = write_config(tmp_path, 1)
        csv = tmp_path / "x.csv"
        csv.write_text("t,raw\n1,2\n")
        assert main(["replay", "-c", str(conf), str(csv)]) == 2
        assert capsys.readouterr().err == (
            f"trimtab replay: {csv}: a CSV file needs --layout LAYOUT.toml to say which column "
            "is what (or convert it first with trimtab convert)\n")
