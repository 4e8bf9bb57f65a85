"""The command's entry point. It imports the CLI itself, so that Ctrl-C while Python loads it
(about half a second: the engine, Arrow, the mapping models) ends as every interrupt does, with
exit code 130 and a message, never a traceback."""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Sequence
from typing import NoReturn


def main(argv: Sequence[str] | None = None) -> int:
    try:
        from cdcnorm import cli
    except KeyboardInterrupt:
        return _interrupted_at_start(argv)
    return cli.main(argv)


def _interrupted_at_start(argv: Sequence[str] | None) -> NoReturn:
    """Say so and end the process at once: nothing is open yet. Returning the exit code would not
    do. In 5 of 60 starts interrupted here, the interpreter still ended as after an unhandled
    Ctrl-C: it printed the message, then killed itself with SIGINT (status -2, not 130)."""
    from cdcnorm.errors import InterruptedRun

    e = InterruptedRun("interrupted while starting: nothing was read or written")
    if "--json" in (argv if argv is not None else sys.argv):
        print(json.dumps(e.as_dict()))
    print("error: " + e.render(), file=sys.stderr)
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(e.exit_code)
