"""Run ``tierwise`` commands as forked children of one process that imported the CLI once.

The crash tests kill many runs at chosen moments; starting a fresh interpreter for each would
spend seconds on imports before the run does anything. This process imports the CLI, writes
``ready``, then for each line on stdin (JSON: ``{"env": {...}, "runs": [[arg, ...], ...]}``)
forks one child per run, writes the children's pids on one line, waits for them and writes
their raw wait statuses on the next. Each child sets ``env``, sends its output to
``<log folder>/<pid>.log`` and runs ``tierwise <args>``, exactly as the console script would.
The parent never opens a database.

Usage: ``python tests/server/cli/forkserver.py LOG_FOLDER``.
"""

from __future__ import annotations

import json
import os
import sys

import server.cli.feeds  # noqa: F401  (imported here once, for every child)
import server.cli.rules  # noqa: F401
import server.services.evaluation  # noqa: F401
import server.services.feeds  # noqa: F401
from server.cli.main import app


def _child(folder: str, env: dict[str, str], args: list[str]) -> None:
    log = os.open(os.path.join(folder, f"{os.getpid()}.log"),
                  os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
    os.dup2(log, 1)
    os.dup2(log, 2)
    os.environ.update(env)
    code = 0
    try:
        app(args=args, prog_name="tierwise")
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    except BaseException:  # noqa: BLE001  (reported through the exit status)
        code = 70
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


def main() -> None:
    folder = sys.argv[1]
    sys.stdout.write("ready\n")
    sys.stdout.flush()
    for line in sys.stdin:
        request = json.loads(line)
        pids = []
        for args in request["runs"]:
            pid = os.fork()
            if pid == 0:
                _child(folder, request.get("env", {}), args)
            pids.append(pid)
        sys.stdout.write(" ".join(map(str, pids)) + "\n")
        sys.stdout.flush()
        statuses = [os.waitpid(pid, 0)[1] for pid in pids]
        sys.stdout.write(" ".join(map(str, statuses)) + "\n")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
