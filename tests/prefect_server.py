"""The test session's one Prefect server, run by conftest's ``prefect_api`` as a process of its own.

Usage: ``python tests/prefect_server.py URL_FILE SESSION_PID``. Starts a server on a temporary database
(``prefect_test_harness``), writes its API URL to URL_FILE (whole, by a rename), and keeps it up until the pytest
process SESSION_PID (the controller under pytest-xdist, whose workers all use this server) has ended; then stops it.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path


def main(url_file: Path, session_pid: int) -> None:
    import psutil
    from prefect.settings import PREFECT_API_URL
    from prefect.testing.utilities import prefect_test_harness

    session = psutil.Process(session_pid)
    started = session.create_time()
    with prefect_test_harness(server_startup_timeout=120):
        aside = url_file.with_name(url_file.name + ".tmp")
        aside.write_text(PREFECT_API_URL.value())
        os.replace(aside, url_file)
        while True:  # the session's process ended (or its pid was taken by another process): stop
            try:
                if session.create_time() != started or session.status() == psutil.STATUS_ZOMBIE:
                    break
            except psutil.NoSuchProcess:
                break
            time.sleep(0.5)


if __name__ == "__main__":
    main(Path(sys.argv[1]), int(sys.argv[2]))
