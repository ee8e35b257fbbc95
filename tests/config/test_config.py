"""Tests of the config tree: loading, exact error lists, cross-field rules and stability proofs."""

from __future__ import annotations

import json
import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from trimtab.config import RELOADABLE, Config, load_config, parse_config, restart_required
from trimtab.errors import ConfigError, ModelError
from trimtab.model.online import RidgeModel
from trimtab.model.stability import phi_sq_max, step_check
from trimtab.model.terms import Scaler

ROOT = Path(__file__).resolve().parents[2]
ALLOWED_SETTINGS = (
    "inputs, products, squares, elapsed, prior, penalise_intercept, initial_state, centre, "
    "scale, scaler_readings"
)


def minimal(**sections: dict[str, Any]) -> dict[str, Any]:
    """The smallest valid config document, with sections replaced or added."""
    doc: dict[str, Any] = {"broker": {"client_id": "gw-test"}, "sensors": {"ids": ["pm-01"]}}
    doc.update(sections)
    return doc


def errors_of(doc: dict[str, Any]) -> list[str]:
    """The error lines parse_config raises for a document (fails the test if it is accepted)."""
    with pytest.raises(ConfigError) as info:
        parse_config(doc, "site.toml")
    return info.value.errors


class TestLoadConfig:
    def test_missing_file_is_an_error(self, tmp_path: Path) -> None:
        """A config file that does not exist is an error naming it, never an empty config."""
        path = tmp_path / "absent.toml"
        with pytest.raises(ConfigError) as info:
            load_config(path)
        assert info.value.errors == [f"{path}: config file not found"]

    def test_directory_is_an_error(self, tmp_path: Path) -> None:
        """A directory given as the config is reported as unreadable."""
        with pytest.raises(ConfigError) as info:
            load_config(tmp_path)
        assert info.value.errors == [f"{tmp_path}: cannot read the config file: Is a directory"]

    def test_toml_syntax_error_names_line_and_column(self, tmp_path: Path) -> None:
        """A TOML syntax error is one line with the line and column of the fault."""
        path = tmp_path / "bad.toml"
        path.write_text('[broker]\nclient_id = "gw"\nport = = 1883\n', encoding="utf-8")
        with pytest.raises(ConfigError) as info:
            load_config(path)
        assert info.value.errors == [f"{path}: line 3, column 8: TOML syntax error: Invalid value"]

    def test_valid_file_loads(self, tmp_path: Path) -> None:
        """A small valid file loads with its defaults filled in."""
        path = tmp_path / "ok.toml"
        path.write_text('[broker]\nclient_id = "gw"\n[sensors]\nids = ["pm-01"]\n', "utf-8")
        cfg = load_config(path)
        assert (cfg.broker.port, cfg.learning.lam, cfg.topics.qos) == (1883, 1.0, 1)

    def test_examples_load(self) -> None:
        """Both example configs under config/ pass validation."""
        for name in ("gateway.toml", "demo.toml"):
            assert isinstance(load_config(ROOT / "config" / name), Config)


class TestErrorLists:
    def test_typo_at_depth_three_in_defaults(self) -> None:
        """A misspelt key in [sensors.defaults] is refused with its path and the nearest key."""
        doc = minimal(sensors={"ids": ["pm-01"], "defaults": {"inptus": ["raw"]}})
        assert errors_of(doc) == [
            "site.toml: sensors.defaults.inptus: unknown key; did you mean 'inputs'? "
            f"allowed: {ALLOWED_SETTINGS}"
        ]

    def test_typo_in_an_override(self) -> None:
        """A misspelt key in a sensor's override names the sensor in the path."""
        doc = minimal(sensors={"ids": ["pm-01"], "overrides": {"pm-01": {"squars": ["raw"]}}})
        assert errors_of(doc) == [
            "site.toml: sensors.overrides.pm-01.squars: unknown key; did you mean 'squares'? "
            f"allowed: {ALLOWED_SETTINGS}"
        ]

    def test_inline_password_is_refused_without_echo(self) -> None:
        """An inline password is refused, pointing at password_env/password_file, never shown."""
        doc = minimal(broker={"client_id": "gw", "username": "u", "password": "s3cret-Pw"})
        errors = errors_of(doc)
        assert errors == [
            "site.toml: broker.password: an inline password is refused (it would sit in this "
            "file and its backups); set broker.password_env to the name of an environment "
            "variable holding it, or broker.password_file to a file only the daemon can read"
        ]
        assert "s3cret-Pw" not in "\n".join(errors)

    def test_shrink_at_or_above_one(self) -> None:
        """alpha_max·lambda_max/memory ≥ 1 is refused with the numbers and the rule."""
        doc = minimal(learning={"alpha_max": 0.5, "lambda_max": 40.0, "memory": 20})
        assert errors_of(doc) == [
            "site.toml: learning.lambda_max: alpha_max·lambda_max/memory = 0.5·40/20 = 1 ≥ 1, "
            "so the per-step shrink factor 1 − αλ/m = 0 is not above 0 (rule: 0 ≤ "
            "alpha_max·lambda_max/memory < 1); lower lambda_max or alpha_max, or raise memory"
        ]

    def test_alpha_outside_its_bounds(self) -> None:
        """A step size outside [alpha_min, alpha_max] is refused with both bounds."""
        doc = minimal(learning={"alpha": 0.3, "alpha_max": 0.25})
        assert errors_of(doc) == [
            "site.toml: learning.alpha: 0.3 is outside [alpha_min, alpha_max] = [0.01, 0.25] "
            "(rule: alpha_min ≤ alpha ≤ alpha_max)"
        ]

    def test_several_sections_report_together(self) -> None:
        """Problems in different sections all come back, one line each, with the bad value."""
        doc = minimal(broker={"client_id": "gw", "port": 70000}, topics={"qos": 3})
        assert errors_of(doc) == [
            "site.toml: broker.port: Input should be less than or equal to 65535 (got 70000)",
            "site.toml: topics.qos: Input should be less than or equal to 2 (got 3)",
        ]

    def test_missing_required_key(self) -> None:
        """A config without broker.client_id says the key is required."""
        assert errors_of({"broker": {}, "sensors": {"ids": ["a"]}}) == [
            "site.toml: broker.client_id: required key is missing"
        ]


class TestRules:
    def test_plain_step_beyond_lms_bound_is_refused(self) -> None:
        """A plain step whose α_max·(λ_max/m + 1 + k·c²) ≥ 2 is refused naming the settings."""
        doc = minimal(learning={"normalised": False, "alpha": 0.02, "alpha_max": 0.06})
        assert errors_of(doc) == [
            "site.toml: learning.alpha_max: sensors.defaults (1 terms, feature clip gives "
            "‖φ‖² ≤ 37): the plain step is not stable: 0.06·(0.05 + 37) = 2.223 ≥ 2 (rule: "
            "alpha_max·(lambda_max/memory + 1 + k·feature_clip²) < 2); lower alpha_max, lower "
            "feature_clip or use fewer terms, or set normalised = true"
        ]

    def test_plain_step_inside_the_bound_is_accepted(self) -> None:
        """The same plain step with α_max just under 2/(λ/m + 1 + k·c²) is accepted."""
        limit = 2.0 / (10.0 / 200 + phi_sq_max(1, 6.0))
        cfg = parse_config(minimal(learning={"normalised": False, "alpha": 0.01,
                                             "alpha_max": 0.999 * limit}))
        assert cfg.learning.alpha_max < limit

    def test_override_resolves_over_defaults(self) -> None:
        """An override replaces only the keys it gives; the rest comes from the defaults."""
        cfg = parse_config(minimal(sensors={
            "ids": ["pm-01", "pm-02"],
            "defaults": {"inputs": ["raw", "temp"], "scaler_readings": 50},
            "overrides": {"pm-02": {"products": [["raw", "temp"]]}},
        }))
        s = cfg.sensor_settings("pm-02")
        assert (s.inputs, s.products, s.scaler_readings) == (("raw", "temp"),
                                                              (("raw", "temp"),), 50)
        assert cfg.sensor_settings("pm-01").products == ()

    def test_override_checked_after_merging(self) -> None:
        """An override whose product names an input the merged settings lack is refused."""
        doc = minimal(sensors={"ids": ["pm-01"],
                               "overrides": {"pm-01": {"products": [["raw", "rh"]]}}})
        assert errors_of(doc) == [
            "site.toml: sensors.overrides.pm-01.products[0]: 'rh' is not one of inputs ['raw']"
        ]

    def test_pattern_and_shared_references(self) -> None:
        """Pattern-matched ids are served and a shared source serves its list."""
        cfg = parse_config(minimal(sensors={
            "ids": ["no2-01"], "pattern": "pm-[0-9]+",
            "shared_references": [{"source": "ref-quay", "serves": ["pm-01", "no2-01"]}],
        }))
        assert [cfg.sensor_allowed(x) for x in ("pm-07", "pm-x", "no2-01")] == [True, False, True]
        assert cfg.reference_targets("ref-quay") == ("pm-01", "no2-01")
        assert cfg.reference_targets("pm-07") == ("pm-07",)
        assert cfg.reference_targets("stranger") == ()

    def test_sensor_served_twice_is_refused(self) -> None:
        """A sensor in two shared reference streams is refused at the second."""
        doc = minimal(sensors={"ids": ["a", "b"], "shared_references": [
            {"source": "r1", "serves": ["a"]}, {"source": "r2", "serves": ["b", "a"]}]})
        assert errors_of(doc) == [
            "site.toml: sensors.shared_references[1].serves[1]: 'a' is already served by 'r1'"
        ]

    def test_colliding_topics_are_refused(self) -> None:
        """A corrected template that can name a readings topic is refused (a feedback loop)."""
        doc = minimal(topics={"readings": "s/{sensor}/v", "corrected": "s/{sensor}/v"})
        assert errors_of(doc) == [
            "site.toml: topics.corrected: 's/{sensor}/v' can name the same topic as "
            "topics.readings 's/{sensor}/v' (rule: the four templates never share a topic)"
        ]

    def test_covariate_must_be_in_payload(self) -> None:
        """An input that is not a payload covariate is refused at the settings that use it."""
        doc = minimal(sensors={"ids": ["a"], "defaults": {"inputs": ["raw", "pressure"]}})
        assert errors_of(doc) == [
            "site.toml: sensors.defaults.inputs: ['pressure'] not in payload.covariates "
            "['rh', 'temp'] (rule: every input but raw is read from the payload)"
        ]

    def test_prior_length_must_match_terms(self) -> None:
        """A prior list must hold k + 1 weights."""
        doc = minimal(sensors={"ids": ["a"], "defaults": {"prior": [0.0, 1.0, 0.0]}})
        assert errors_of(doc) == [
            "site.toml: sensors.defaults.prior: 3 weights given; the model has k + 1 = 2 "
            "(intercept first, then one per term)"
        ]


class TestReload:
    def test_reloadable_paths(self) -> None:
        """Learning and output keys reload live; broker, topics and sensors do not."""
        assert {"learning.lambda", "learning.alpha", "output.cap", "logging.level"} <= RELOADABLE
        assert not any(p.startswith(("broker.", "topics.", "sensors.")) for p in RELOADABLE)

    def test_restart_required_lists_only_fixed_changes(self) -> None:
        """A diff touching λ and the broker port reports only the port as needing a restart."""
        old = parse_config(minimal())
        new = parse_config(minimal(broker={"client_id": "gw-test", "port": 1884},
                                   learning={"lambda": 2.0}))
        assert restart_required(old, new) == ("broker.port",)


def _leaf_keys(schema: dict[str, Any]) -> set[str]:
    """Every leaf key of the JSON schema as a dotted path (arrays of tables as ``name[]``)."""
    defs = schema["$defs"]

    def resolve(s: dict[str, Any]) -> dict[str, Any]:
        return defs[s["$ref"].rsplit("/", 1)[-1]] if "$ref" in s else s

    def walk(s: dict[str, Any], prefix: str) -> set[str]:
        out: set[str] = set()
        for name, sub in resolve(s)["properties"].items():
            path = f"{prefix}.{name}" if prefix else name
            r = resolve(sub)
            if "properties" in r:
                out |= walk(r, path)
            elif r.get("type") == "array" and "$ref" in r.get("items", {}):
                out |= walk(r["items"], path + "[]")
            else:
                out.add(path)
        return out

    return walk(schema, "")


class TestReference:
    def test_reference_lists_exactly_the_schema_keys(self) -> None:
        """Every leaf key of the schema has a row in config/README.md's key tables, and no more."""
        text = (ROOT / "config" / "README.md").read_text(encoding="utf-8")
        section = text.split("<!-- config:keys -->")[1].split("<!-- /config:keys -->")[0]
        rows = set(re.findall(r"^\| `([^`]+)` \|", section, flags=re.MULTILINE))
        assert rows == _leaf_keys(Config.model_json_schema(by_alias=True))


# -- stability: accepted configs never produce a non-finite weight ------------------------------

TERMS = st.sampled_from([
    {"inputs": ["raw"]},
    {"inputs": ["raw", "temp", "rh"]},
    {"inputs": ["raw", "temp"], "products": [["raw", "temp"]], "elapsed": True},
    {"inputs": ["raw", "temp", "rh"], "products": [["raw", "rh"]], "squares": ["temp"]},
])


def _near_bound(terms: dict[str, Any], normalised: bool, clip: float, memory: int,
                lambda_max: float, frac: float) -> dict[str, Any]:
    """A config document whose α_max sits at ``frac`` of the largest α_max both rules allow."""
    k = len(terms["inputs"]) + len(terms.get("products", [])) + len(terms.get("squares", []))
    k += int(terms.get("elapsed", False))
    actual_at_one = step_check("x", terms=k, alpha_max=1.0, lambda_max=lambda_max,
                               memory=memory, clip=clip, normalised=normalised).actual
    limit = 2.0 / actual_at_one
    if lambda_max > 0:
        limit = min(limit, memory / lambda_max)
    alpha_max = frac * limit
    return minimal(
        sensors={"ids": ["s-1"], "defaults": terms},
        learning={"alpha": alpha_max, "alpha_min": alpha_max / 8, "alpha_max": alpha_max,
                  "lambda": lambda_max, "lambda_max": lambda_max, "memory": memory,
                  "normalised": normalised, "feature_clip": clip},
    )


def _run(cfg: Config, seed: int, steps: int) -> tuple[float, ...]:
    """Feed ``steps`` random bounded references to a fresh model at α_max; return θ."""
    lc = cfg.learning
    s = cfg.sensor_settings("s-1")
    spec = s.term_spec()
    model = RidgeModel(spec, Scaler.identity(spec.n_terms), lam=lc.lambda_max, memory=lc.memory,
                       huber_delta=lc.huber_delta, normalised=lc.normalised, clip=lc.feature_clip)
    rng = np.random.default_rng(seed)
    spread = 2.0 * lc.feature_clip  # inputs reach beyond the clip so it is often active
    xs = rng.uniform(-spread, spread, size=(steps, 3))
    ys = rng.uniform(-100.0, 100.0, size=steps)
    for i in range(steps):
        inputs = {"raw": float(xs[i, 0]), "temp": float(xs[i, 1]), "rh": float(xs[i, 2])}
        model.step(inputs, 86400.0 * i, float(ys[i]), lc.alpha_max)
    return model.theta


class TestStabilityProof:
    @settings(max_examples=6, deadline=None)
    @given(terms=TERMS, normalised=st.booleans(), clip=st.floats(0.5, 8.0),
           memory=st.integers(1, 400), lambda_max=st.floats(0.0, 50.0),
           frac=st.floats(0.9, 0.999), seed=st.integers(0, 2**32 - 1))
    def test_accepted_config_keeps_weights_finite(self, terms: dict[str, Any], normalised: bool,
                                                  clip: float, memory: int, lambda_max: float,
                                                  frac: float, seed: int) -> None:
        """A config accepted near its bounds runs 10,000 references at α_max with finite weights."""
        cfg = parse_config(_near_bound(terms, normalised, clip, memory, lambda_max, frac))
        theta = _run(cfg, seed, 10_000)
        assert all(math.isfinite(w) for w in theta)

    def test_refused_plain_step_does_diverge(self) -> None:
        """Past the plain-step bound the same stream blows up, so the bound is not slack."""
        doc = _near_bound({"inputs": ["raw", "temp", "rh"]}, False, 3.0, 200, 1.0, 1.5)
        assert any("the plain step is not stable" in e for e in errors_of(doc))
        ok = _near_bound({"inputs": ["raw", "temp", "rh"]}, False, 3.0, 200, 1.0, 0.9)
        cfg = parse_config(ok)
        over = cfg.model_copy(update={"learning": cfg.learning.model_copy(
            update={"alpha_max": cfg.learning.alpha_max / 0.9 * 1.5})})
        try:
            theta = _run(over, 7, 10_000)
        except ModelError:  # the model refused a step that would make a weight non-finite
            return
        assert max(abs(w) for w in theta) > 1e50, f"no divergence: θ = {json.dumps(theta)}"
