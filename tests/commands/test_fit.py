"""Tests of ``trimtab fit`` and of the model-state file it writes."""

from __future__ import annotations

import json
import re
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy

from trimtab.cli import main
from trimtab.config import load_config
from trimtab.engine.wiring import make_engine
from trimtab.errors import DataError
from trimtab.messages import Reading
from trimtab.model.online import RidgeModel
from trimtab.model.terms import Scaler, TermSpec
from trimtab.store.modelfile import load_model_file, save_model_file

NORRIS = Path(scipy.__file__).parent / "stats/tests/data/nist_linregress/Norris.dat"
# NIST StRD Norris certified values, as printed in Norris.dat (shipped in scipy's wheel).
NORRIS_B0 = -0.262323073774029
NORRIS_B1 = 1.00211681802045
NORRIS_SD = 0.884796396144373
T0 = 1767225600.0


def _norris_rows() -> list[tuple[float, float]]:
    """(x, y) pairs of NIST StRD Norris: x an ozone monitor's reading, y the reference."""
    body = NORRIS.read_text().split("Data:       y          x")[1]
    return [(float(b), float(a)) for a, b in (ln.split() for ln in body.strip().splitlines())]


def _write_csv(path: Path, rows: list[tuple[float, float]], iso: bool = False) -> Path:
    lines = ["t,raw,ref"]
    for i, (x, y) in enumerate(rows):
        t = f"2026-01-01T00:{i:02d}:00Z" if iso else f"{T0 + 3600 * i:.0f}"
        lines.append(f"{t},{x!r},{y!r}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _coefficients(out: str) -> dict[str, float]:
    table = out.split("covariance of the coefficients")[0]
    found = re.findall(r"^  (offset|gain \(raw\)|\S+)\s+(-?\d\S*)(?:\s+\S+)?$", table,
                       re.MULTILINE)
    return {k: float(v) for k, v in found}


class TestFitCommand:
    def test_norris_fit_prints_certified_values_and_writes_model(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """λ = 0 on NIST StRD Norris prints its certified offset, gain and residual SD and
        writes a model file that reads back to the same coefficients."""
        data = _write_csv(tmp_path / "norris.csv", _norris_rows())
        out = tmp_path / "m.json"
        rc = main(["fit", str(data), "--lambda", "0", "--sensor", "o3-01", "-o", str(out),
                   "--precision", "12"])
        text = capsys.readouterr().out
        assert rc == 0
        coef = _coefficients(text)
        assert coef["offset"] == pytest.approx(NORRIS_B0, rel=1e-10)
        assert coef["gain (raw)"] == pytest.approx(NORRIS_B1, rel=1e-10)
        assert re.search(r"residual SD\s+0\.884796396144\s", text)
        assert "n             36" in text
        model, doc = load_model_file(out)
        assert doc["sensor"] == "o3-01"
        assert model.coefficients()["offset"] == pytest.approx(NORRIS_B0, rel=1e-9)
        assert doc["fit"]["residual_sd"] == pytest.approx(NORRIS_SD, rel=1e-9)

    def test_console_script_subprocess(self, tmp_path: Path) -> None:
        """The installed ``trimtab`` console script fits NIST StRD Norris in a real process."""
        data = _write_csv(tmp_path / "norris.csv", _norris_rows(), iso=True)
        script = Path(sys.executable).parent / "trimtab"
        proc = subprocess.run(
            [str(script), "fit", str(data), "--lambda", "0", "-o", str(tmp_path / "m.json"),
             "--precision", "9"],
            capture_output=True, text=True, timeout=120, check=False,
        )
        assert proc.returncode == 0, proc.stderr
        assert _coefficients(proc.stdout)["gain (raw)"] == pytest.approx(NORRIS_B1, rel=1e-8)
        assert (tmp_path / "m.json").exists()

    def test_lambda_zero_with_too_few_rows_is_refused(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """Two references for three weights at λ = 0 exit 2 saying λ > 0 makes it solvable."""
        data = _write_csv(tmp_path / "few.csv", _norris_rows()[:2])
        rc = main(["fit", str(data), "--squares", "raw", "--lambda", "0",
                   "-o", str(tmp_path / "m.json")])
        assert rc == 2
        assert "λ > 0 makes the system solvable" in capsys.readouterr().err
        assert not (tmp_path / "m.json").exists()

    def test_lambda_auto_prints_the_curve(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """--lambda auto prints one CV line per candidate λ, marks the chosen one, records it."""
        data = _write_csv(tmp_path / "norris.csv", _norris_rows())
        out = tmp_path / "m.json"
        rc = main(["fit", str(data), "--lambda", "auto", "--folds", "4", "-o", str(out)])
        text = capsys.readouterr().out
        assert rc == 0
        assert "4-fold time-blocked cross-validation" in text
        assert text.count("← chosen") == 1
        _, doc = load_model_file(out)
        cv = doc["fit"]["cross_validation"]
        assert len(cv["lambdas"]) == len(cv["rmse"]) == 13
        assert doc["fit"]["lambda"] == cv["chosen"]

    @pytest.mark.parametrize(
        ("content", "where"),
        [
            ("t,raw,ref\n1,2,3\n2,4,5\n3,abc,6\n", r"bad\.csv:4: column 2 \('raw'\)"),
            ("t,raw,ref\n1,2,3\n2,4\n", r"bad\.csv:3: 2 fields"),
            ("t,raw\n1,2\n", r"bad\.csv:1: no column 'ref'"),
            ("t,raw,ref\n2026-01-01T00:00:00,2,3\n", r"bad\.csv:2: column 1 \('t'\).*no zone"),
            ("t,raw,ref\n1,nan,3\n", r"bad\.csv:2: column 2 \('raw'\).*not a finite"),
        ],
    )
    def test_malformed_csv_names_file_line_column(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str], content: str, where: str
    ) -> None:
        """A malformed CSV exits 2 with one line naming the file, line and column."""
        bad = tmp_path / "bad.csv"
        bad.write_text(content)
        rc = main(["fit", str(bad), "--lambda", "1", "-o", str(tmp_path / "m.json")])
        err = capsys.readouterr().err
        assert rc == 2
        assert re.search(where, err), err
        assert err.count("\n") == 1


class TestFitStreamFile:
    def _stream(self, path: Path) -> Path:
        rows = _norris_rows()[:12]
        events = []
        for i, (x, y) in enumerate(rows):
            t = T0 + 600.0 * i
            events.append({"t": t, "sensor": "o3-01", "reading": {"raw": x}})
            events.append({"t": t + 5.0, "sensor": "o3-02", "reading": {"raw": x + 1.0}})
            events.append({"t": t + 30.0, "sensor": "o3-01", "reference": y})
        events.append({"t": T0 + 600.0 * 30, "sensor": "o3-01", "reference": 1.0})  # no reading
        path.write_text("".join(json.dumps(e) + "\n" for e in events))
        return path

    def test_stream_pairs_reference_with_reading_before_it(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """Each reference pairs with the sensor's reading just before it; the fit then equals
        the CSV fit of the same pairs, and the far reference is dropped and counted."""
        stream = self._stream(tmp_path / "s.jsonl")
        rc = main(["fit", str(stream), "--sensor", "o3-01", "--lambda", "0",
                   "--tolerance", "60", "-o", str(tmp_path / "a.json")])
        text = capsys.readouterr().out
        assert rc == 0
        assert "12 references, sensor o3-01" in text
        assert "dropped 1 of 13 references" in text
        csv_path = _write_csv(tmp_path / "same.csv", _norris_rows()[:12])
        assert main(["fit", str(csv_path), "--lambda", "0", "-o", str(tmp_path / "b.json")]) == 0
        capsys.readouterr()
        a, _ = load_model_file(tmp_path / "a.json")
        b, _ = load_model_file(tmp_path / "b.json")
        np.testing.assert_allclose(
            list(a.coefficients().values()), list(b.coefficients().values()), rtol=1e-12
        )

    def test_several_sensors_need_sensor_option(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """A stream with several sensors and no --sensor exits 2 listing them."""
        stream = self._stream(tmp_path / "s.jsonl")
        rc = main(["fit", str(stream), "--lambda", "1", "-o", str(tmp_path / "m.json")])
        assert rc == 2
        assert "['o3-01', 'o3-02']" in capsys.readouterr().err


    def test_bad_stream_line_names_file_and_line(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """A broken line in a stream file exits 2 naming the file and the line."""
        stream = self._stream(tmp_path / "s.jsonl")
        stream.write_text(stream.read_text() + "{not json\n")
        rc = main(["fit", str(stream), "--sensor", "o3-01", "--lambda", "1",
                   "-o", str(tmp_path / "m.json")])
        assert rc == 2
        assert re.search(r"s\.jsonl:38: ", capsys.readouterr().err)


class TestModelFile:
    def _model(self) -> RidgeModel:
        return RidgeModel(TermSpec(("raw", "temp")), Scaler((30.0, 20.0), (8.0, 5.0)),
                          lam=1.0, memory=50.0, theta=[31.0, 7.9, 0.1 + 0.2], spread=1.25)

    def test_round_trip_and_mode(self, tmp_path: Path) -> None:
        """A saved model reads back bit-equal, and the file is readable by its owner only."""
        path = tmp_path / "m.json"
        m = self._model()
        save_model_file(path, m, sensor="no2-07", fit={"n": 3})
        back, doc = load_model_file(path)
        assert back.to_dict() == m.to_dict()
        assert doc["sensor"] == "no2-07" and doc["fit"] == {"n": 3}
        assert stat.S_IMODE(path.stat().st_mode) == 0o600
        assert [p.name for p in tmp_path.iterdir()] == ["m.json"]

    @pytest.mark.parametrize(
        ("mutate", "match"),
        [
            (lambda d: d.update(format="other"), "key 'format'"),
            (lambda d: d.update(version=2), "key 'version'"),
            (lambda d: d.pop("model"), "missing key 'model'"),
            (lambda d: d["model"].update(theta=[1.0]), r"key 'model'.*theta"),
            (lambda d: d["model"]["scaler"].update(scale=[8.0, 0.0]), r"key 'model'.*scale\[1\]"),
        ],
    )
    def test_bad_file_names_file_and_key(self, tmp_path: Path, mutate: object, match: str) -> None:
        """A malformed model file raises DataError naming the file and the key."""
        path = tmp_path / "m.json"
        save_model_file(path, self._model())
        doc = json.loads(path.read_text())
        mutate(doc)  # type: ignore[operator]
        path.write_text(json.dumps(doc))
        with pytest.raises(DataError, match=match) as info:
            load_model_file(path)
        assert str(path) in str(info.value)

    def test_not_json(self, tmp_path: Path) -> None:
        """A file that is not JSON raises DataError naming the file and line."""
        path = tmp_path / "m.json"
        path.write_text("{\n  nope\n")
        with pytest.raises(DataError, match=r"m\.json:2: not valid JSON"):
            load_model_file(path)


class TestFitUncertaintyOutput:
    def _iso_csv(self, path: Path, bom: bool = False) -> Path:
        """ISO/TS 28037:2010 clause 6 unequal-weights data (x, y, u(y) as in NPL's software
        for it), as a CSV with an uncertainty column."""
        rows = zip((1, 2, 3, 4, 5, 6), (3.2, 4.3, 7.6, 8.6, 11.7, 12.8),
                   (0.5, 0.5, 0.5, 1.0, 1.0, 1.0), strict=True)
        text = "t,raw,ref,u\n" + "".join(f"{x},{x},{y},{u}\n" for x, y, u in rows)
        path.write_bytes(("\ufeff" if bom else "").encode() + text.encode())
        return path

    def test_weighted_fit_prints_uncertainties_and_chi2(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """--uncertainty: the ISO/TS 28037 clause 6 results (a = 0.885, u(a) = 0.530,
        b = 2.057, u(b) = 0.178, χ² = 4.131, as the issue quotes them) at --precision 4."""
        data = self._iso_csv(tmp_path / "iso.csv")
        assert main(["fit", str(data), "--uncertainty", "u", "--precision", "4",
                     "-o", str(tmp_path / "m.json")]) == 0
        text = capsys.readouterr().out
        assert re.search(r"^  offset\s+0\.8852\s+0\.5297$", text, re.MULTILINE)
        assert re.search(r"^  gain \(raw\)\s+2\.057\s+0\.1779$", text, re.MULTILINE)
        assert "χ²            4.131  on 4 degrees of freedom" in text
        assert "covariance of the coefficients" in text
        assert "λ             0  " in text

    def test_json_has_every_digit_and_the_covariance(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """--json prints the report with full-precision floats, the same as the model file's."""
        data = self._iso_csv(tmp_path / "iso.csv")
        out = tmp_path / "m.json"
        assert main(["fit", str(data), "--uncertainty", "u", "--json", "-o", str(out)]) == 0
        doc = json.loads(capsys.readouterr().out)
        saved = json.loads(out.read_text())["fit"]
        assert doc["coefficients"] == saved["coefficients"]
        assert doc["covariance"] == saved["covariance"]
        assert doc["chi2"] == pytest.approx(4.130801687763715, rel=1e-12)
        assert doc["uncertainties"]["raw"] == pytest.approx(0.177892016741205, rel=1e-12)
        assert doc["dof"] == 4 and doc["weighted"] is True

    def test_csv_with_a_byte_order_mark(self, tmp_path: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
        """A CSV saved by a spreadsheet with a UTF-8 BOM fits exactly as one without it."""
        plain = self._iso_csv(tmp_path / "plain.csv")
        bom = self._iso_csv(tmp_path / "bom.csv", bom=True)
        assert bom.read_bytes().startswith(b"\xef\xbb\xbf")
        docs = []
        for data in (plain, bom):
            assert main(["fit", str(data), "--lambda", "0", "--json",
                         "-o", str(tmp_path / "m.json")]) == 0
            docs.append(json.loads(capsys.readouterr().out)["coefficients"])
        assert docs[0] == docs[1]

    def test_penalised_fit_says_uncertainties_are_not_given(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """With λ > 0 the report prints no uncertainty column and says why."""
        data = self._iso_csv(tmp_path / "iso.csv")
        assert main(["fit", str(data), "--lambda", "0.5", "-o", str(tmp_path / "m.json")]) == 0
        text = capsys.readouterr().out
        assert "std. uncertainty" not in text and "covariance" not in text
        assert "uncertainties not given for λ > 0" in text

    @pytest.mark.parametrize(("extra", "message"), [
        (["--lambda", "auto"], "--uncertainty fits by weighted least squares, which needs "
                               "--lambda 0 (not auto)"),
        (["--lambda", "0.3"], "needs --lambda 0, not 0.3"),
        (["--precision", "0"], "--precision 0: give 1 to 17 significant digits"),
    ])
    def test_refusals(self, tmp_path: Path, capsys: pytest.CaptureFixture[str],
                      extra: list[str], message: str) -> None:
        """A weighted ridge or a precision out of range is refused with one line, exit 2."""
        data = self._iso_csv(tmp_path / "iso.csv")
        assert main(["fit", str(data), "--uncertainty", "u", *extra,
                     "-o", str(tmp_path / "m.json")]) == 2
        assert message in capsys.readouterr().err

    def test_zero_uncertainty_names_row_and_column(self, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
        """A reference uncertainty of 0 is refused naming file, line and column."""
        data = tmp_path / "z.csv"
        data.write_text("t,raw,ref,u\n1,1,2,0.5\n2,2,4,0\n3,3,6,0.5\n")
        assert main(["fit", str(data), "--uncertainty", "u", "-o", str(tmp_path / "m")]) == 2
        assert capsys.readouterr().err == (f"trimtab fit: {data}:3: column 4 ('u'): "
                                           "uncertainty 0 must be > 0\n")


class TestPriorIsWhatTheOperatorSays:
    """An initial_state's prior: the file's when the config is silent, the config's otherwise."""

    def _setup(self, tmp_path: Path, prior: str) -> tuple[Path, Path]:
        data = _write_csv(tmp_path / "norris.csv", _norris_rows())
        model = tmp_path / "m.json"
        assert main(["fit", str(data), "--lambda", "0.1", "--prior", "zero", "-o",
                     str(model)]) == 0
        cfg = tmp_path / "c.toml"
        cfg.write_text('[broker]\nclient_id = "p"\n[sensors]\nids = ["o3"]\n'
                       f'[sensors.defaults]\ninitial_state = "{model}"\n{prior}\n'
                       f'[state]\ndir = "{tmp_path / "state"}"\n')
        return cfg, model

    @pytest.mark.parametrize("prior", ["", 'prior = "initial"', 'prior = "zero"',
                                       "prior = [9.0, 9.0]", 'prior = "factory"'])
    def test_the_model_pulls_toward_the_prior_the_config_gives(
            self, tmp_path: Path, capsys: pytest.CaptureFixture[str], prior: str) -> None:
        """The engine's model takes the configured prior (unset: the fitted weights the model
        starts from); check prints the effective one."""
        cfg_path, model_path = self._setup(tmp_path, prior)
        capsys.readouterr()
        fitted, _ = load_model_file(model_path)
        engine = make_engine(load_config(cfg_path))
        engine.process(Reading(T0, "o3", {"raw": 80.0}))
        model = engine.model("o3")
        assert model is not None
        expected = {"": list(fitted.theta), 'prior = "initial"': list(fitted.theta),
                    'prior = "zero"': [0.0, 0.0], "prior = [9.0, 9.0]": [9.0, 9.0],
                    'prior = "factory"': [fitted.scaler.centre[0], fitted.scaler.scale[0]]}
        assert list(model.prior) == expected[prior]
        assert list(model.theta) == list(fitted.theta)  # the prior never moves the weights
        assert main(["check", "-c", str(cfg_path)]) == 0
        out = capsys.readouterr().out
        shown = {"": "initial: the fitted weights", 'prior = "initial"': "initial: the fitted",
                 'prior = "zero"': "zero (plain ridge)", "prior = [9.0, 9.0]":
                 "configured weights", 'prior = "factory"': "factory (corrected = raw)"}
        assert f"prior: {shown[prior]}" in out

    def test_fit_takes_prior_weights(self, tmp_path: Path,
                                     capsys: pytest.CaptureFixture[str]) -> None:
        """--prior W0,W1 is written into the model file; a wrong count is one clear line."""
        data = _write_csv(tmp_path / "norris.csv", _norris_rows())
        model = tmp_path / "m.json"
        assert main(["fit", str(data), "--prior", "1.5,2.5", "--lambda", "1", "-o",
                     str(model)]) == 0
        assert list(load_model_file(model)[0].prior) == [1.5, 2.5]
        assert main(["fit", str(data), "--prior", "1,2,3", "-o", str(model)]) == 2
        assert "needs 2 finite weights" in capsys.readouterr().err


class TestFitParquet:
    def test_a_parquet_file_fits_as_the_same_csv_does(self, tmp_path: Path) -> None:
        """NIST Norris as Parquet gives the model the CSV gives, bit for bit."""
        import pyarrow as pa
        import pyarrow.parquet as pq

        rows = _norris_rows()
        csv_path = _write_csv(tmp_path / "norris.csv", rows)
        pq.write_table(pa.table({"t": [T0 + 3600 * i for i in range(len(rows))],
                                 "raw": [x for x, _ in rows], "ref": [y for _, y in rows]}),
                       tmp_path / "norris.parquet")
        for name in ("norris.csv", "norris.parquet"):
            assert main(["fit", str(tmp_path / name), "--lambda", "0", "-o",
                         str(tmp_path / f"{name}.json")]) == 0
        a, _ = load_model_file(tmp_path / "norris.csv.json")
        b, _ = load_model_file(tmp_path / "norris.parquet.json")
        assert a.theta == b.theta and len(rows) > 30
        assert csv_path.exists()
