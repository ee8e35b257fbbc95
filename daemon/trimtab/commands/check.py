"""``trimtab check -c CONFIG``: validate a config and print it as it would run, with its proofs.

Prints the effective config (every default filled in) as TOML that loads back to the same
config, the derived stability figures with the inequality each one checks, the memory in
references and in time, and which keys a SIGHUP reload applies live. The config holds no
password (only where to find one), so nothing secret can be printed. Errors are raised as
ConfigError; the CLI prints one line each and exits 2.
"""

from __future__ import annotations

import argparse
import json
from typing import Any

from trimtab.commands.options import deprecated
from trimtab.config import RELOADABLE, Config, file_problems, load_config
from trimtab.config.figures import derived_figures
from trimtab.engine.settings import configured_prior, configured_scaler, prior_mode, spec_of
from trimtab.engine.wiring import initial_models
from trimtab.errors import ConfigError, EncodeError
from trimtab.model.online import RidgeModel
from trimtab.model.terms import Scaler
from trimtab.wire.fielderrors import key


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-c", "--config", dest="config", default=None, metavar="CONFIG",
                   help="the TOML config file to check")
    p.add_argument("old_config", nargs="?", default=None, metavar="CONFIG",
                   help=argparse.SUPPRESS)  # the positional spelling of 0.1, kept one release
    p.add_argument(
        "--no-files",
        action="store_true",
        help="skip checking the files and environment variable the config names "
        "(for checking a gateway's config on another machine)",
    )
    p.add_argument(
        "--json", action="store_true", help="print config and figures as one JSON object"
    )


def run(args: argparse.Namespace) -> int:
    if args.old_config is not None:
        if args.config is not None:
            raise ConfigError("give the config once, with -c CONFIG")
        deprecated("trimtab check CONFIG", "trimtab check -c CONFIG")
        args.config = args.old_config
    if args.config is None:
        raise ConfigError("no config given: trimtab check -c CONFIG")
    source = str(args.config)
    cfg = load_config(source)
    if not args.no_files:
        problems = file_problems(cfg, source)
        if problems:
            raise ConfigError(f"{source}: {len(problems)} problem(s) with named files", problems)
    figures = derived_figures(cfg)
    # the same initial models run and replay load: their files and terms are checked too
    models = {} if args.no_files else initial_models(cfg)
    figures["models"] = model_figures(cfg, models)
    if args.json:
        out = {
            "config": cfg.model_dump(mode="json", by_alias=True),
            "derived": figures,
            "reloadable": sorted(RELOADABLE),
        }
        print(json.dumps(out, indent=2, ensure_ascii=False))
    else:
        print(render(cfg, figures, source))
    return 0


def render(cfg: Config, figures: dict[str, Any], source: str) -> str:
    """The human-readable report: effective config, then derived figures."""
    lines = [f"# {source}: valid", "", "# -- effective config " + "-" * 60]
    data = cfg.model_dump(by_alias=True)
    # an override shows only what it replaces; the rest comes from sensors.defaults
    data["sensors"]["overrides"] = {
        sid: ov.model_dump(by_alias=True, exclude_none=True)
        for sid, ov in cfg.sensors.overrides.items()
    }
    lines += to_toml(data)
    lines += ["", "# -- derived figures " + "-" * 61]
    lines += _figures(figures)
    if "models" in figures:
        lines += ["", "# -- models: effective scaler and prior " + "-" * 42]
        lines += _model_lines(figures["models"])
    lines += ["", "# -- reload " + "-" * 70]
    lines.append("# live on SIGHUP: " + ", ".join(sorted(RELOADABLE)))
    lines.append("# any other change needs a restart")
    return "\n".join(lines)


def model_figures(cfg: Config, models: dict[str, RidgeModel]) -> dict[str, Any]:
    """Each sensor setting's starting scaler and effective prior, and how the scaler moves.

    ``models`` are the loaded ``initial_state`` files (empty with ``--no-files``: a sensor
    that starts from a file then shows only the file's name).
    """
    lc = cfg.learning
    moves = (f"follows the operating range: scale = {lc.scaler_width:g} running sd, "
             f"time constant {lc.scaler_span:g} s" if lc.scaler == "follow" else "fixed")
    out: dict[str, Any] = {}
    names = ["defaults", *cfg.sensors.ids, *(o for o in cfg.sensors.overrides
                                             if o not in cfg.sensors.ids)]
    for name in names:
        s = cfg.sensors.defaults if name == "defaults" else cfg.sensor_settings(name)
        spec = spec_of(s)
        entry: dict[str, Any] = {"terms": list(spec.names()), "scaler_moves": moves}
        scaler: Scaler | None = None
        start: tuple[float, ...] | None = None
        if s.initial_state is not None:
            entry["scaler_from"] = f"initial_state {s.initial_state}"
            model = models.get(str(s.initial_state))
            if model is not None:
                scaler, start = model.scaler, model.theta
        else:
            scaler = configured_scaler(spec, s, cfg.learning)
            entry["scaler_from"] = ("configured centre and scale" if scaler is not None else
                                    f"the first {s.scaler_readings} readings")
        if scaler is not None:
            entry["centre"], entry["scale"] = list(scaler.centre), list(scaler.scale)
        mode = prior_mode(s)
        prior: list[float] | None
        if isinstance(mode, tuple):
            entry["prior_from"], prior = "configured weights", list(mode)
        else:
            entry["prior_from"] = {
                "factory": "factory (corrected = raw)", "zero": "zero (plain ridge)",
                "initial": (f"initial: the fitted weights of {s.initial_state}"
                            if s.initial_state is not None else
                            "initial: the factory calibration the model starts from"),
            }[mode]
            if mode == "initial" and s.initial_state is not None:
                prior = None if start is None else list(start)
            else:
                prior = None if scaler is None else configured_prior(s, spec, scaler, start)
        entry["prior"] = prior
        out[name] = entry
    return out


def _model_lines(m: dict[str, Any]) -> list[str]:
    out = []
    for name, e in m.items():
        out.append(f"# {name}: terms {', '.join(e['terms'])}")
        where = e["scaler_from"]
        if "centre" in e:
            where += f": centre {_nums(e['centre'])}, scale {_nums(e['scale'])}"
        out.append(f"#   scaler from {where}; {e['scaler_moves']}")
        prior = "" if e["prior"] is None else f": {_nums(e['prior'])} (standardised)"
        out.append(f"#   prior: {e['prior_from']}{prior}")
    return out


def _nums(v: list[float]) -> str:
    return "[" + ", ".join(f"{x:.6g}" for x in v) + "]"


def _figures(f: dict[str, Any]) -> list[str]:
    s = f["shrink"]
    out = [
        f"# shrink factor per step 1 − αλ/m (rule: {s['rule']}):",
        f"#   at alpha, lambda: {s['factor_at_alpha_lambda']:.6g}"
        f" (over the whole memory: {s['over_memory_at_alpha_lambda']:.4g})",
        f"#   at alpha_max, lambda_max: {s['factor_at_max_bounds']:.6g}",
        f"#   at alpha_min, lambda_min: {s['factor_at_min_bounds']:.6g}",
        f"#   {s['note']}",
    ]
    m = f["memory"]
    out.append(
        f"# memory: {m['references']} references = {m['seconds']:.6g} s"
        f" ≈ {m['days']:.3g} days at one reference per {m['reference_interval_s']:g} s"
    )
    out.append("# step stability per sensor settings (margin = bound / actual, > 1 is stable):")
    for label, g in f["step_stability"].items():
        out.append(
            f"#   {label}: k = {g['terms']} terms ({', '.join(g['term_names'])}), {g['step']}"
        )
        out.append(f"#     rule: {g['inequality']}")
        out.append(
            f"#     {g['worked']} = {g['actual']:.6g} < {g['bound']:g}; margin {g['margin']:.3g}"
        )
    for w in f["warnings"]:
        out.append(f"# warning: {w}")
    return out


def to_toml(data: dict[str, Any], prefix: str = "") -> list[str]:
    """A dumped config as TOML: scalars first, then sub-tables; unset keys as comments."""
    lines: list[str] = []
    tables: list[tuple[str, Any]] = []
    for k, v in data.items():
        if isinstance(v, dict) or (
            isinstance(v, tuple | list) and v and all(isinstance(x, dict) for x in v)
        ):
            tables.append((k, v))
        elif v is None:
            lines.append(f"# {key(k)} is unset")
        else:
            lines.append(f"{key(k)} = {_value(v)}")
    for k, v in tables:
        path = f"{prefix}.{key(k)}" if prefix else key(k)
        if isinstance(v, dict):
            # a table holding only sub-tables needs no header of its own
            if not v or any(not isinstance(x, dict) for x in v.values()):
                lines += ["", f"[{path}]"]
            lines += to_toml(v, path)
        else:
            for item in v:
                lines += ["", f"[[{path}]]", *to_toml(item, path)]
    return lines


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v)  # finite: the config refuses nan and inf
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, tuple | list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise EncodeError(f"cannot write {type(v).__name__} as TOML")
