"""`trimtab replay` summary: readable lines, --json for machines, exit 2 when nothing is usable."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from trimtab.cli import main
from trimtab.streamfile import write_events

from .support import synthetic_stream, write_config


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
        assert err[1].startswith("replay: references: ")
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
        assert sum(summary["references"].values()) > 0
