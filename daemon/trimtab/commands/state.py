"""``trimtab state``: inspect a daemon's state, and move a sensor's model between daemons.

The daemon must be stopped: the state directory is locked while it runs.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from trimtab.config import load_config
from trimtab.engine.engine import Engine
from trimtab.engine.wiring import make_engine
from trimtab.errors import DataError, StateError
from trimtab.store.modelfile import FORMAT as MODEL_FORMAT
from trimtab.store.privatefile import write_private
from trimtab.store.records import record_to_event
from trimtab.store.statestore import StateStore


def add_arguments(p: argparse.ArgumentParser) -> None:
    sub = p.add_subparsers(dest="action", metavar="ACTION", required=True)
    show = sub.add_parser("show", help="one JSON line per sensor: updates, RMSE, α, weights")
    show.add_argument("target", nargs="?", default=None, metavar="SENSOR",
                      help="only this sensor")
    export = sub.add_parser("export", help="write one sensor's whole state to a file")
    export.add_argument("target", metavar="SENSOR", help="the sensor to export")
    export.add_argument("-o", "--output", type=Path, default=None,
                        help="file to write (mode 0600; default: standard output)")
    export.add_argument("--drop", action="store_true",
                        help="also remove the sensor from this daemon's state")
    imp = sub.add_parser("import", help="add an exported sensor to this daemon's state")
    imp.add_argument("target", metavar="FILE", help="a file written by `state export`")
    for q in (show, export, imp):
        q.add_argument("-c", "--config", required=True, type=Path, help="config file (TOML)")


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    state_dir = Path(cfg.state.dir)
    exported: dict[str, Any] | None = None
    if args.action == "import":
        exported = _read_export(Path(args.target))
    elif not state_dir.is_dir():
        # show and export only read: never create the state directory to find it empty
        raise DataError(f"{state_dir}: no state directory (the daemon has not run with "
                        f"{args.config}, or state.dir points elsewhere)")
    store = StateStore(state_dir, durability=cfg.state.durability, validate=record_to_event)
    rec = store.recover()  # takes the directory's lock: refused while the daemon runs
    try:
        engine = make_engine(cfg)
        if rec.state is not None:
            engine.load_state(rec.state)
        for record in rec.records:
            engine.process(record_to_event(record))
        known = engine.stats()["sensors"]
        if args.action in ("show", "export") and args.target is not None \
                and args.target not in known:
            have = ", ".join(sorted(known)) or "none"
            raise DataError(f"sensor {args.target!r}: not in the state at {state_dir} "
                            f"(sensors there: {have})")
        if args.action == "show":
            for sensor, s in known.items():
                if args.target is not None and sensor != args.target:
                    continue
                model = engine.model(sensor)
                if model is not None:
                    s = {**s, "theta": list(model.theta), "terms": list(model.spec.names())}
                print(json.dumps({"sensor": sensor, **s}, allow_nan=False))
            if not known:
                print(f"state show: no sensors in the state at {state_dir}", file=sys.stderr)
            return 0
        if args.action == "export":
            exported = engine.export_sensor(args.target)
            text = json.dumps(exported, allow_nan=False)
            if args.output is None:
                print(text)
            else:
                write_private(args.output, text + "\n")
            if args.drop:
                engine.drop_sensor(args.target)
                store.checkpoint(engine.state_dict())
            return 0
        assert exported is not None
        return _import(engine, store, exported, Path(args.target), state_dir)
    finally:
        store.close()


def _read_export(path: Path) -> dict[str, Any]:
    """The JSON object of a ``state export`` file; DataError naming the file otherwise."""
    what = "a sensor-state export (a file written by `trimtab state export`)"
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise DataError(f"{path}: file not found; expected {what}") from None
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror}); expected {what}") from exc
    try:
        doc = json.loads(data.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise DataError(f"{path}: not UTF-8 text (byte {exc.start}); expected {what}") from None
    except json.JSONDecodeError as exc:
        raise DataError(f"{path}: not JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}); "
                        f"expected {what}") from None
    if not isinstance(doc, dict):
        raise DataError(f"{path}: a JSON {type(doc).__name__}, not an object; expected {what}")
    if doc.get("format") == MODEL_FORMAT:
        raise DataError(f"{path}: a model-state file from `trimtab fit`, not {what}; to start "
                        "a sensor from it, name it as initial_state in the config "
                        "([sensors.defaults] or the sensor's override) and restart the daemon")
    if doc.get("format") != "trimtab-sensor-state":
        raise DataError(f"{path}: not {what} (its \"format\" is {doc.get('format')!r})")
    return doc


def _import(engine: Engine, store: StateStore, exported: dict[str, Any], path: Path,
            state_dir: Path) -> int:
    """Add the exported sensor; say whether it was new, replaced, or already there unchanged."""
    sensor = str(exported.get("sensor"))
    before: dict[str, Any] | None = None
    if sensor in engine.stats()["sensors"]:
        before = json.loads(json.dumps(engine.export_sensor(sensor)))
    try:
        sensor = engine.import_sensor(exported)
    except StateError as exc:
        raise DataError(f"{path}: {exc}") from exc
    after = json.loads(json.dumps(engine.export_sensor(sensor)))
    if before is not None and before == after:
        print(f"state import: sensor {sensor} is already in {state_dir} with exactly this "
              f"state (imported before?); nothing changed", file=sys.stderr)
        return 0
    store.checkpoint(engine.state_dict())
    verb = "replaced the state of" if before is not None else "imported"
    print(f"state import: {verb} sensor {sensor} in {state_dir} from {path}", file=sys.stderr)
    return 0
