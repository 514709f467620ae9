"""Run one ``seawall`` command line when told to: for racing two real CLI processes.

``python cli_race.py ARGS...`` imports the CLI and what its commands import
lazily (the model and scikit-learn), says ``ready`` on stderr,
waits for a line on stdin, then runs ``ops.cli.main(ARGS)`` (what the
``seawall`` entry point runs) and exits with its code.  Start-up time
(about a second of imports) is then out of the race.
"""
import sys

import ops.retrain  # noqa: F401 - the commands' own lazy imports (the model, scikit-learn) stay out of the race too
from ops.cli import main

if __name__ == "__main__":
    print("ready", file=sys.stderr, flush=True)
    sys.stdin.readline()
    sys.exit(main(sys.argv[1:]))
