"""``trimtab schema``: print the config's JSON Schema, generated from the pydantic models."""

from __future__ import annotations

import argparse
import json

from trimtab.config import Config


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--compact", action="store_true", help="one line instead of indented")


def run(args: argparse.Namespace) -> int:
    schema = Config.model_json_schema(by_alias=True, mode="validation")
    schema["title"] = "trimtab configuration"
    print(json.dumps(schema, indent=None if args.compact else 2, ensure_ascii=False))
    return 0
