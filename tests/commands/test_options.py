"""One option vocabulary across `trimtab` and `trimtab-sim`, with 0.1's spellings still working."""

from __future__ import annotations

import argparse
from collections.abc import Iterator
from pathlib import Path

import pytest

from trimtab.cli import build_parser as trimtab_parser
from trimtab.cli import main as trimtab_main
from trimtab_sim.cli import build_parser as sim_parser
from trimtab_sim.cli import main as sim_main
from trimtab_sim.cli import old_spellings

NOTICE = "note: `{old}` is deprecated and goes in 0.2; use `{new}`\n"


def _commands(parser: argparse.ArgumentParser, prefix: str) -> Iterator[
        tuple[str, argparse.ArgumentParser]]:
    """Every (sub-)command parser under ``parser``, with its full name."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield f"{prefix} {name}", sub
                yield from _commands(sub, f"{prefix} {name}")


ALL = [*_commands(trimtab_parser(), "trimtab"), *_commands(sim_parser(), "trimtab-sim")]


class TestVocabulary:
    @pytest.mark.parametrize(("name", "parser"), ALL, ids=[n for n, _ in ALL])
    def test_shared_options_are_spelled_alike(self, name: str,
                                              parser: argparse.ArgumentParser) -> None:
        """-c/--config, -o/--output; --json and --quiet are flags; help has no reST markup."""
        for action in parser._actions:
            if action.help == argparse.SUPPRESS:
                continue  # an old spelling kept for one release
            opts = set(action.option_strings)
            if "--config" in opts or "-c" in opts:
                assert opts == {"-c", "--config"}, (name, opts)
            if "--output" in opts or "-o" in opts:
                assert opts == {"-o", "--output"}, (name, opts)
            if opts & {"--json", "--quiet"}:
                assert action.nargs == 0, (name, opts)
            assert "``" not in (action.help or ""), (name, action.help)
            assert not (opts & {"--out", "--report-dir"}), (name, opts)
        assert "``" not in (parser.description or "")

    @pytest.mark.parametrize("main", [trimtab_main, sim_main], ids=["trimtab", "trimtab-sim"])
    def test_both_have_version(self, main: object, capsys: pytest.CaptureFixture[str]) -> None:
        """--version prints the program and version on both command lines."""
        with pytest.raises(SystemExit) as done:
            main(["--version"])  # type: ignore[operator]
        assert done.value.code == 0
        assert capsys.readouterr().out.strip().endswith("0.1.0")

    @pytest.mark.parametrize("speed", ["0", "-1", "nan", "inf", "fast"])
    def test_play_speed_must_be_positive(self, speed: str,
                                         capsys: pytest.CaptureFixture[str]) -> None:
        """`play --speed` refuses zero, negative, non-finite and non-numbers (exit 2, usage)."""
        with pytest.raises(SystemExit) as done:
            sim_main(["play", "s.jsonl", "-c", "c.toml", "--speed", speed])
        assert done.value.code == 2
        assert "argument --speed:" in capsys.readouterr().err


class TestOldSpellings:
    def test_record_quiet_seconds_becomes_idle(self, capsys: pytest.CaptureFixture[str]) -> None:
        """`record --quiet 3` (0.1) is `--idle 3` with a notice; a bare --quiet is the flag."""
        argv = old_spellings(["record", "-c", "x", "-o", "y", "--quiet", "3"])
        assert argv == ["record", "-c", "x", "-o", "y", "--idle", "3"]
        assert capsys.readouterr().err == NOTICE.format(old="--quiet SECONDS",
                                                        new="--idle SECONDS")
        args = sim_parser().parse_args(old_spellings(["record", "-c", "x", "-o", "y",
                                                      "--quiet", "--idle", "2.5"]))
        assert args.quiet is True and args.idle == 2.5
        assert capsys.readouterr().err == ""

    def test_bench_json_file_becomes_output(self, capsys: pytest.CaptureFixture[str]) -> None:
        """`bench --json FILE` (0.1) is `-o FILE` with a notice; a bare --json is the flag."""
        args = sim_parser().parse_args(old_spellings(["bench", "--quick", "--json", "b.json"]))
        assert args.output == Path("b.json") and args.json is False
        assert capsys.readouterr().err == NOTICE.format(old="--json FILE", new="-o FILE")
        args = sim_parser().parse_args(old_spellings(["bench", "--json", "--quick"]))
        assert args.json is True and args.output is None

    @pytest.mark.parametrize(("argv", "dest", "old", "new"), [
        (["demo", "--out", "d"], "out", "--out", "--output"),
        (["score", "a", "b", "--report-dir", "d"], "report_dir", "--report-dir", "--output"),
    ])
    def test_renamed_options_still_work(self, capsys: pytest.CaptureFixture[str],
                                        argv: list[str], dest: str, old: str,
                                        new: str) -> None:
        """0.1's --out and --report-dir still set the directory, with a notice."""
        args = sim_parser().parse_args(argv)
        assert str(getattr(args, dest)) == "d"
        assert capsys.readouterr().err == NOTICE.format(old=old, new=new)
        args = sim_parser().parse_args([*argv[:-2], "-o", "d"])
        assert str(getattr(args, dest)) == "d"
        assert capsys.readouterr().err == ""
