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
from trimtab.records import record_to_event
from trimtab.statestore import StateStore
from trimtab.wiring import make_engine


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("action", choices=["show", "export", "import"],
                   help="show: per-sensor summary; export: one sensor to a file; "
                        "import: a sensor from a file")
    p.add_argument("-c", "--config", required=True, type=Path, help="config file (TOML)")
    p.add_argument("target", nargs="?", default=None,
                   help="show/export: a sensor id (show: optional); import: the export file")
    p.add_argument("-o", "--output", type=Path, default=None, help="export: file to write")
    p.add_argument("--drop", action="store_true",
                   help="export: also remove the sensor from this daemon's state")


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    state_dir = Path(cfg.state.dir)
    store = StateStore(state_dir, durability=cfg.state.durability)
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
        if args.target is None:
            raise DataError(f"state {args.action}: name a "
                            f"{'sensor' if args.action == 'export' else 'file'}")
        if args.action == "export":
            exported = engine.export_sensor(args.target)
            text = json.dumps(exported, allow_nan=False)
            if args.output is None:
                print(text)
            else:
                args.output.write_text(text + "\n")
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
