"""Operators' CSV files into stream events (`trimtab convert`): delimiters, BOM, zones, errors."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from trimtab.cli import main
from trimtab.errors import ConfigError, DataError
from trimtab.messages import Reading, Reference
from trimtab.wire.csvstream import CsvLayout, load_layout, read_csv_events
from trimtab.wire.streamfile import read_events

LOGGER = ("\ufeffDatum;NO2 WE;T Luft;Referenz\n"
          "2026-03-29 01:00;12,5;4,1;\n"
          "2026-03-29 01:30;13,0;4,0;11,2\n"
          "2026-03-29 03:00;14,0;4,2;\n"
          "2026-03-29 03:30;;4,3;12,0\n")
LAYOUT = CsvLayout(inputs={"raw": "NO2 WE", "temp": "T Luft"}, time="Datum", sensor="no2-07",
                   reference="Referenz", window=1800.0, tz="Europe/Berlin", decimal_comma=True)


def _write(tmp_path: Path, text: str, name: str = "data.csv") -> Path:
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8"))
    return path


class TestReadCsvEvents:
    def test_spreadsheet_export_with_bom_semicolons_and_local_time(self, tmp_path: Path) -> None:
        """BOM, ';', decimal commas and Berlin local time across the spring clock change; the
        instants match pandas' own tz_localize (an independent conversion)."""
        result = read_csv_events(_write(tmp_path, LOGGER), LAYOUT)
        assert result.delimiter == ";" and result.rows == 4
        readings = [e for e in result.events if isinstance(e, Reading)]
        refs = [e for e in result.events if isinstance(e, Reference)]
        assert [r.inputs for r in readings] == [{"raw": 12.5, "temp": 4.1},
                                                {"raw": 13.0, "temp": 4.0},
                                                {"raw": 14.0, "temp": 4.2}]
        assert [(r.value, r.window) for r in refs] == [(11.2, 1800.0), (12.0, 1800.0)]
        local = ["2026-03-29 01:00", "2026-03-29 01:30", "2026-03-29 03:00"]
        expect = pd.DatetimeIndex(local).tz_localize("Europe/Berlin", ambiguous="raise",
                                                     nonexistent="raise")
        assert [r.t for r in readings] == [ts.timestamp() for ts in expect]
        assert result.skipped == {"no raw value": 1}
        assert [e.t for e in result.events] == sorted(e.t for e in result.events)

    @pytest.mark.parametrize(("local", "word"), [
        ("2026-03-29 02:30", "does not exist in Europe/Berlin (the clocks went forward)"),
        ("2026-10-25 02:30", "occurs twice in Europe/Berlin (the clocks went back)"),
    ])
    def test_clock_change_times_are_refused(self, tmp_path: Path, local: str,
                                            word: str) -> None:
        """A local time the zone skips or repeats names file, line, column and why; pandas
        refuses the same times (nonexistent/ambiguous='raise')."""
        with pytest.raises(Exception):  # noqa: B017 (pandas raises its own error types)
            pd.DatetimeIndex([local]).tz_localize("Europe/Berlin", ambiguous="raise",
                                                  nonexistent="raise")
        path = _write(tmp_path, f"Datum;NO2 WE\n2026-01-01 00:00;1\n{local};2\n")
        layout = CsvLayout(inputs={"raw": "NO2 WE"}, time="Datum", sensor="a",
                           tz="Europe/Berlin")
        with pytest.raises(DataError) as info:
            read_csv_events(path, layout)
        assert str(info.value) == f"{path}:3: column 1 ('Datum'): local time {local!r} {word}" \
            + ("; no one instant is meant: use a column with a zone" if "twice" in word else "")

    def test_zone_in_the_column_and_epoch_seconds(self, tmp_path: Path) -> None:
        """ISO 8601 with an offset and plain epoch seconds need no --tz; tabs are sniffed."""
        path = _write(tmp_path, "t\traw\tsensor\n2026-01-01T01:00:00+01:00\t5\ts-1\n"
                                "1767229200\t6\ts-2\n")
        result = read_csv_events(path, CsvLayout(inputs={"raw": "raw"}, sensor_column="sensor"))
        assert result.delimiter == "\t"
        assert [(e.t, e.sensor) for e in result.events] == [(1767225600.0, "s-1"),
                                                            (1767229200.0, "s-2")]

    @pytest.mark.parametrize(("text", "layout", "message"), [
        ("t,raw\n2026-01-01 00:00,1\n", CsvLayout(inputs={"raw": "raw"}, sensor="a"),
         ":2: column 1 ('t'): time '2026-01-01 00:00' has no zone; say which with --tz"),
        ("t,raw\n1,abc\n", CsvLayout(inputs={"raw": "raw"}, sensor="a"),
         ":2: column 2 ('raw'): 'abc' is not a number"),
        ("t,raw\n1,2,3\n", CsvLayout(inputs={"raw": "raw"}, sensor="a"),
         ":2: 3 fields, the header has 2 (delimiter ',')"),
        ("t,raw\n1,2\n", CsvLayout(inputs={"raw": "value"}, sensor="a"),
         ":1: no column 'value' in the header (have 't', 'raw'; delimiter ',')"),
        ("t,raw,id\n1,2,a/b\n", CsvLayout(inputs={"raw": "raw"}, sensor_column="id"),
         ":2: column 3 ('id'): sensor id 'a/b': "),
        ("t raw\n1 2\n", CsvLayout(inputs={"raw": "raw"}, sensor="a"),
         ":1: cannot tell the delimiter from the header line"),
    ])
    def test_errors_name_file_line_and_column(self, tmp_path: Path, text: str,
                                              layout: CsvLayout, message: str) -> None:
        """Every refusal names the file, the line and (for a cell) the column."""
        path = _write(tmp_path, text)
        with pytest.raises(DataError) as info:
            read_csv_events(path, layout)
        assert str(info.value).startswith(f"{path}{message}")


class TestConvertCommand:
    def test_converted_stream_is_read_by_the_stream_reader(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """`trimtab convert` writes a stream file that read_events takes back event for event,
        and says what it wrote."""
        src = _write(tmp_path, LOGGER)
        out = tmp_path / "s.jsonl"
        assert main(["convert", str(src), "-o", str(out), "--sensor", "no2-07",
                     "--inputs", "raw=NO2 WE,temp=T Luft", "--time", "Datum",
                     "--tz", "Europe/Berlin", "--reference", "Referenz", "--window", "1800",
                     "--decimal-comma"]) == 0
        assert list(read_events(out)) == read_csv_events(src, LAYOUT).events
        err = capsys.readouterr().err.splitlines()
        assert err[0] == (f"convert: {src}: 4 rows (delimiter ';') → 3 readings, 2 references, "
                          f"2026-03-29T00:00:00Z to 2026-03-29T01:30:00Z, to {out}")
        assert err[1] == "convert: skipped 1 row(s) without a reading: no raw value"

    def test_unknown_zone_is_one_line(self, tmp_path: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
        """A zone name that is not IANA's is refused with an example, exit 2."""
        src = _write(tmp_path, "t,raw\n1,2\n")
        assert main(["convert", str(src), "-o", str(tmp_path / "o"), "--sensor", "a",
                     "--tz", "CEST"]) == 2
        assert "--tz 'CEST': not a known IANA time zone" in capsys.readouterr().err


class TestLayoutFile:
    def test_layout_file_gives_the_same_layout_as_the_options(self, tmp_path: Path) -> None:
        """A [csv] table with the options' keys loads to the same CsvLayout."""
        path = tmp_path / "l.toml"
        path.write_text('[csv]\ntime = "Datum"\nsensor = "no2-07"\nreference = "Referenz"\n'
                        'window = 1800\ntz = "Europe/Berlin"\ndecimal_comma = true\n'
                        '[csv.inputs]\nraw = "NO2 WE"\ntemp = "T Luft"\n')
        assert load_layout(path) == LAYOUT

    def test_misspelt_key_is_named_with_a_suggestion(self, tmp_path: Path) -> None:
        """An unknown key names the file and the path, with the closest allowed key."""
        path = tmp_path / "l.toml"
        path.write_text('[csv]\nsensor = "a"\nwindw = 60\n[csv.inputs]\nraw = "x"\n')
        with pytest.raises(ConfigError) as info:
            load_layout(path)
        assert info.value.errors[0].startswith(
            f"{path}: csv.windw: unknown key; did you mean 'window'?")

    def test_layout_and_options_together_are_refused(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """`convert --layout L --tz Z` is refused: one place for the mapping."""
        path = tmp_path / "l.toml"
        path.write_text('[csv]\nsensor = "a"\n[csv.inputs]\nraw = "x"\n')
        src = _write(tmp_path, "t,x\n1,2\n")
        assert main(["convert", str(src), "--layout", str(path), "--tz", "UTC",
                     "-o", str(tmp_path / "o")]) == 2
        assert "not both (--tz given too)" in capsys.readouterr().err


class TestParquet:
    """The same layouts read Parquet files (written here by pyarrow, as a logger exports)."""

    def _table(self, tmp_path: Path, times: list[object], tz: str | None) -> Path:
        import pyarrow as pa
        import pyarrow.parquet as pq

        ts_type = pa.timestamp("s", tz=tz)
        table = pa.table({
            "Datum": pa.array(times, type=ts_type),
            "NO2 WE": pa.array([12.5, 13.0, 14.0, None], type=pa.float64()),
            "T Luft": pa.array([4.1, 4.0, 4.2, 4.3], type=pa.float64()),
            "Referenz": pa.array([None, 11.2, None, 12.0], type=pa.float64()),
        })
        path = tmp_path / "logger.parquet"
        pq.write_table(table, path)
        return path

    def test_local_times_give_the_events_the_csv_gives(self, tmp_path: Path) -> None:
        """Naive local time stamps with tz: exactly the CSV logger's events (the CSV above)."""
        from datetime import datetime

        times = [datetime(2026, 3, 29, 1, 0), datetime(2026, 3, 29, 1, 30),
                 datetime(2026, 3, 29, 3, 0), datetime(2026, 3, 29, 3, 30)]
        path = self._table(tmp_path, times, None)
        layout = CsvLayout(inputs={"raw": "NO2 WE", "temp": "T Luft"}, time="Datum",
                           sensor="no2-07", reference="Referenz", window=1800.0,
                           tz="Europe/Berlin")
        got = read_csv_events(path, layout)
        want = read_csv_events(_write(tmp_path, LOGGER), LAYOUT)
        assert got.events == want.events and got.skipped == want.skipped
        assert got.delimiter == "parquet"

    def test_zoned_time_stamps_need_no_tz(self, tmp_path: Path) -> None:
        """A UTC time stamp column carries its zone: the instants are those stamps."""
        from datetime import UTC, datetime

        times = [datetime(2026, 3, 29, h, tzinfo=UTC) for h in (0, 1, 2, 3)]
        path = self._table(tmp_path, times, "UTC")
        layout = CsvLayout(inputs={"raw": "NO2 WE"}, time="Datum", sensor="no2-07")
        readings = [e for e in read_csv_events(path, layout).events if isinstance(e, Reading)]
        assert [r.t for r in readings] == [t.timestamp() for t in times[:3]]

    def test_convert_and_replay_take_parquet(self, tmp_path: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
        """`trimtab convert` writes the stream; a file that is not Parquet is one clear line."""
        from datetime import UTC, datetime

        times = [datetime(2026, 3, 29, h, tzinfo=UTC) for h in (0, 1, 2, 3)]
        path = self._table(tmp_path, times, "UTC")
        out = tmp_path / "s.jsonl"
        assert main(["convert", str(path), "-o", str(out), "--sensor", "no2-07", "--time",
                     "Datum", "--inputs", "raw=NO2 WE", "--reference", "Referenz"]) == 0
        assert len(list(read_events(out))) == 5
        bad = tmp_path / "bad.parquet"
        bad.write_text("t,raw\n1,2\n")
        capsys.readouterr()
        assert main(["convert", str(bad), "-o", str(out), "--sensor", "x"]) == 2
        err = capsys.readouterr().err
        assert "not a Parquet file" in err and "Traceback" not in err
