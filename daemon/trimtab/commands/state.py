"""``trimtab state``: inspect a daemon's state, and move a sensor's model between daemons.

The daemon must be stopped: the state directory is locked while it runs.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from trimtab.config import load_config
from trimtab.errors import DataError
from trimtab.privatefile import write_private
from trimtab.records import record_to_event
from trimtab.statestore import StateStore
from trimtab.wiring import make_engine


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
    store = StateStore(state_dir, durability=cfg.state.durability, validate=record_to_event)
    rec = store.recover()  # takes the directory's lock: refused while the daemon runs
    try:
        engine = make_engine(cfg)
        if rec.state is not None:
            engine.load_state(rec.state)
        for record in rec.records:
            engine.process(record_to_event(record))
        if args.action == "show":
            stats = engine.stats()["sensors"]
            if args.target is not None:
                stats = {args.target: stats.get(args.target)}
            for sensor, s in stats.items():
                model = engine.model(sensor)
                if model is not None:
                    s = {**s, "theta": list(model.theta), "terms": list(model.spec.names())}
                print(json.dumps({"sensor": sensor, **(s or {})}, allow_nan=False))
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
        try:
            exported = json.loads(Path(args.target).read_text())
        except (OSError, json.JSONDecodeError) as exc:
            raise DataError(f"{args.target}: cannot read a sensor-state export: {exc}") \
                from exc
        sensor = engine.import_sensor(exported)
        store.checkpoint(engine.state_dict())
        print(f"state import: sensor {sensor} imported into {state_dir}", file=sys.stderr)
        return 0
    finally:
        store.close()
