"""``trimtab run``: the daemon."""

from __future__ import annotations

import argparse
from pathlib import Path

from trimtab.config import load_config
from trimtab.errors import StateError, StateFault
from trimtab.logs import configure_logging
from trimtab.service.daemon import Service


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-c", "--config", required=True, type=Path, help="config file (TOML)")


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    configure_logging(cfg.logging.level, cfg.logging.format)
    try:
        Service(cfg, config_path=args.config, loader=load_config).serve()
    except StateFault:
        raise
    except StateError as exc:  # the state directory, not the command line: its own exit code
        raise StateFault(str(exc)) from exc
    return 0
