"""``movecast serve`` whose solver processes cannot start while a flag file exists (a fault test's server).

Started as a script by ``tests/api/test_pool_faults_live.py``; the flag file's path is in
``FAULT_SPAWN_FLAG``.  A start then fails as ``fork`` fails at a pids limit (EAGAIN).  The
guard keeps the fork server, which imports this file as its main module, from serving too.
"""

from __future__ import annotations

import errno
import os
import sys
from pathlib import Path

if __name__ == "__main__":
    from service.api import compute
    from service.cli import main

    flag = Path(os.environ["FAULT_SPAWN_FLAG"])
    spawn = compute.SolverPool._spawn

    def failing_while_flagged(self: compute.SolverPool, **kwargs: bool) -> object:
        if flag.exists():
            raise OSError(errno.EAGAIN, "Resource temporarily unavailable")
        return spawn(self, **kwargs)

    compute.SolverPool._spawn = failing_while_flagged  # type: ignore[assignment]
    sys.exit(main(["serve"]))
