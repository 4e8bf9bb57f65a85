from __future__ import annotations

import argparse
from typing import Any


def add_commands(sub: Any) -> None:
    return None


def run_command(args: argparse.Namespace, out: Any) -> int:
    raise NotImplementedError(args.command)
