"""Tests of ``trimtab check`` and ``trimtab schema``: exit codes, output, no secrets shown."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from trimtab.cli import main
from trimtab.config import load_config, parse_config

ROOT = Path(__file__).resolve().parents[2]
SECTIONS = {"broker", "topics", "payload", "sensors", "learning", "pairing", "output", "state",
            "logging", "status", "metrics"}


def trimtab(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    """Run the real ``trimtab`` command line in a child process."""
    return subprocess.run([sys.executable, "-m", "trimtab.cli", *args], cwd=cwd,
                          capture_output=True, text=True, check=False)


class TestCheckProcess:
    def test_demo_config_exits_zero(self, tmp_path: Path) -> None:
        """The demo config checks clean, files included, from a fresh working directory."""
        done = trimtab("check", "-c", str(ROOT / "config" / "demo.toml"), cwd=tmp_path)
        assert (done.returncode, done.stderr) == (0, "")
        assert "valid" in done.stdout.splitlines()[0]

    def test_gateway_config_exits_zero_without_files(self, tmp_path: Path) -> None:
        """The gateway config checks clean with --no-files (its TLS files live on the gateway)."""
        done = trimtab("check", "--no-files", "-c", str(ROOT / "config" / "gateway.toml"),
                       cwd=tmp_path)
        assert (done.returncode, done.stderr) == (0, "")

    def test_invalid_config_exits_two_with_one_line_per_error(self, tmp_path: Path) -> None:
        """A config with two problems exits 2 and prints exactly those two lines."""
        path = tmp_path / "bad.toml"
        path.write_text('[broker]\nclient_id = "gw"\nport = 0\n[sensors]\nids = ["a"]\n'
                        "[learning]\nalpha = 1.5\n", encoding="utf-8")
        done = trimtab("check", "-c", str(path), cwd=tmp_path)
        assert done.returncode == 2
        assert done.stderr.splitlines() == [
            f"trimtab check: {path}: broker.port: Input should be greater than or equal to 1 "
            "(got 0)",
            f"trimtab check: {path}: learning.alpha: 1.5 is outside [alpha_min, alpha_max] = "
            "[0.01, 1] (rule: alpha_min ≤ alpha ≤ alpha_max)",
        ]
        assert done.stdout == ""

    def test_schema_is_json_with_every_section(self, tmp_path: Path) -> None:
        """``trimtab schema`` prints a JSON Schema whose properties are the config's sections."""
        done = trimtab("schema", cwd=tmp_path)
        assert done.returncode == 0
        schema = json.loads(done.stdout)
        assert set(schema["properties"]) == SECTIONS
        assert schema["required"] == ["broker", "sensors"]


class TestCheckOutput:
    def test_effective_config_loads_back_unchanged(self, capsys: pytest.CaptureFixture[str],
                                                   tmp_path: Path) -> None:
        """The TOML that check prints parses back to the same config as the gateway example."""
        path = ROOT / "config" / "gateway.toml"
        assert main(["check", "--no-files", "-c", str(path)]) == 0
        printed = capsys.readouterr().out
        assert parse_config(tomllib.loads(printed)) == load_config(path)

    def test_figures_are_printed(self, capsys: pytest.CaptureFixture[str]) -> None:
        """check prints the shrink factor, each settings group's margin, memory and reloads."""
        assert main(["check", "--no-files", "-c", str(ROOT / "config" / "gateway.toml")]) == 0
        out = capsys.readouterr().out
        assert "#   at alpha_max, lambda_max: 0.970238" in out
        assert "# memory: 336 references = 1.2096e+06 s ≈ 14 days" in out
        groups = "#   sensors.overrides.no2-02: k = 4 terms (raw, temp, raw*temp, elapsed_days)"
        assert groups in out
        assert out.count("< 2; margin 2.01") == 3
        assert "# live on SIGHUP: learning.alpha," in out

    def test_password_never_printed(self, capsys: pytest.CaptureFixture[str], tmp_path: Path,
                                    monkeypatch: pytest.MonkeyPatch) -> None:
        """With the password in the environment, neither check's text nor its JSON shows it."""
        monkeypatch.setenv("KQ_MQTT_PW", "Tide-Gauge-7731")
        path = tmp_path / "c.toml"
        path.write_text('[broker]\nclient_id = "gw"\nusername = "u"\npassword_env = "KQ_MQTT_PW"\n'
                        f'[sensors]\nids = ["a"]\n[state]\ndir = "{tmp_path / "st"}"\n', "utf-8")
        assert main(["check", "-c", str(path)]) == 0
        assert main(["check", "--json", "-c", str(path)]) == 0
        out = capsys.readouterr().out
        assert "KQ_MQTT_PW" in out and "Tide-Gauge-7731" not in out

    def test_missing_named_files_are_errors(self, capsys: pytest.CaptureFixture[str]) -> None:
        """Without --no-files, the gateway example's absent TLS and password files exit 2."""
        assert main(["check", "-c", str(ROOT / "config" / "gateway.toml")]) == 2
        err = capsys.readouterr().err.splitlines()
        assert f"trimtab check: {ROOT / 'config' / 'gateway.toml'}: broker.tls.ca_file: " \
               "'/etc/trimtab/quay-ca.pem' is not a readable file" in err


class TestCheckOptions:
    def test_old_positional_config_still_works_with_a_notice(
        self, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """`check CONFIG` (0.1's spelling) still checks, and says to use `-c CONFIG`."""
        assert main(["check", "--no-files", str(ROOT / "config" / "demo.toml")]) == 0
        captured = capsys.readouterr()
        assert "valid" in captured.out.splitlines()[0]
        assert captured.err == ("note: `trimtab check CONFIG` is deprecated and goes in 0.2; "
                                "use `trimtab check -c CONFIG`\n")

    def test_no_config_is_one_line_and_exit_2(self, capsys: pytest.CaptureFixture[str]) -> None:
        """`check` without a config says how to give one."""
        assert main(["check"]) == 2
        err = capsys.readouterr().err
        assert err == "trimtab check: no config given: trimtab check -c CONFIG\n"
