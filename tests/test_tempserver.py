"""The temporary Prefect server's process: own session, output to a log file rather than the terminal."""

import os
import subprocess
import sys

import pytest
from prefect.settings import PREFECT_HOME, temporary_settings

from graphkit.flows.tempserver import _LOG_KEEP_BYTES, _OwnSessionSubprocess, server_log_path

CHILD = "import os, sys; sys.stderr.write('server says %d\\n' % os.getsid(0)); print('out line')"


def test_server_output_goes_to_its_log_file_not_the_terminal(tmp_path):
    with temporary_settings(updates={PREFECT_HOME: tmp_path / "home"}):
        path = server_log_path()
        proc = _OwnSessionSubprocess.Popen([sys.executable, "-c", CHILD])
        assert proc.wait(timeout=60) == 0
        text = path.read_text()
        assert "out line" in text and "server says" in text
        child_sid = int(text.split("server says ")[1].split()[0])
        assert child_sid != os.getsid(0)  # its own session: the terminal's Ctrl-C does not reach it
        proc = _OwnSessionSubprocess.Popen([sys.executable, "-c", CHILD])  # a second run appends
        proc.wait(timeout=60)
        assert path.read_text().count("out line") == 2


def test_server_log_starts_afresh_once_large(tmp_path):
    with temporary_settings(updates={PREFECT_HOME: tmp_path / "home"}):
        path = server_log_path()
        path.write_bytes(b"x" * (_LOG_KEEP_BYTES + 1))
        _OwnSessionSubprocess.Popen([sys.executable, "-c", CHILD]).wait(timeout=60)
        assert path.stat().st_size < 1000 and "out line" in path.read_text()


def test_output_already_redirected_is_left_alone(tmp_path):
    with temporary_settings(updates={PREFECT_HOME: tmp_path / "home"}):
        proc = _OwnSessionSubprocess.Popen([sys.executable, "-c", CHILD], stdout=subprocess.PIPE,
                                           stderr=subprocess.PIPE, text=True)
        out, err = proc.communicate(timeout=60)
        assert "out line" in out and "server says" in err
        assert not server_log_path().exists() or "out line" not in server_log_path().read_text()


@pytest.mark.slow  # imports Prefect's server, as the real start does
def test_background_start_hands_back_the_watchdog_or_the_error(monkeypatch):
    import threading

    from prefect.settings import PREFECT_API_URL

    from graphkit.flows import tempserver

    # with a configured server there is nothing to start: the waiter answers None, no thread, no guard
    monkeypatch.setattr(tempserver, "guard_temporary_server", lambda: 1 / 0)
    with temporary_settings(updates={PREFECT_API_URL: "http://127.0.0.1:9/api"}):
        assert tempserver.start_temporary_server()() is None

    seen = []
    monkeypatch.setattr(tempserver, "guard_temporary_server",
                        lambda: seen.append(threading.current_thread().name) or 4711)
    with temporary_settings(restore_defaults={PREFECT_API_URL}):  # no server configured (as without the env var)
        assert tempserver.start_temporary_server()() == 4711
        assert seen == ["graphkit-server-start"]  # it ran in its own thread

        def fails():
            raise RuntimeError("Timed out while attempting to connect to ephemeral Prefect API server.")

        monkeypatch.setattr(tempserver, "guard_temporary_server", fails)
        wait = tempserver.start_temporary_server()
        try:
            wait()
        except RuntimeError as exc:
            assert "Timed out" in str(exc)
        else:
            raise AssertionError("the waiter must raise what the start raised")
