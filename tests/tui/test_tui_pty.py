"""``mfma tui`` in a real pseudo-terminal (standard library pty): it draws, takes typed text, quits with exit 0."""

from __future__ import annotations

import fcntl
import os
import select
import struct
import subprocess
import sys
import termios
import time

import pytest

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="needs a POSIX pseudo-terminal")


def _read_until(fd: int, needle: bytes, seen: bytearray, timeout_s: float) -> bool:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        ready, _, _ = select.select([fd], [], [], 0.1)
        if ready:
            try:
                chunk = os.read(fd, 65536)
            except OSError:  # the child closed the terminal
                return needle in seen
            seen += chunk
            if needle in seen:
                return True
    return False


def test_tui_in_a_real_terminal(tmp_path):
    master, slave = os.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 80, 0, 0))  # 80 x 24
    env = {**os.environ, "TERM": "xterm-256color", "COLUMNS": "80", "LINES": "24", "MFMA_DATA_DIR": str(tmp_path)}
    proc = subprocess.Popen([sys.executable, "-m", "assistant.cli", "tui", "--out", str(tmp_path)],
                            stdin=slave, stdout=slave, stderr=slave, cwd=tmp_path, env=env, start_new_session=True)
    os.close(slave)
    seen = bytearray()
    try:
        assert _read_until(master, b"WITHDRAW", seen, 60), bytes(seen[-2000:])  # the footer's withdraw key
        assert _read_until(master, b"Withdraw", seen, 10)  # and the button
        os.write(master, b"\t")  # into the probe name field
        time.sleep(0.5)
        os.write(master, b"lever-pty")
        assert _read_until(master, b"lever-pty", seen, 15), "typed text not drawn in the focused field"
        # the status bar says withdrawn once the first status has come: until then the app asks before quitting
        # ("the stage is not known to be safe"), which a loaded machine can stretch past the typing above
        assert _read_until(master, b"withdrawn", seen, 30), bytes(seen[-2000:])
        os.write(master, b"\x11")  # ctrl+q: the stage is withdrawn, so the app quits without asking
        deadline = time.monotonic() + 20
        while proc.poll() is None and time.monotonic() < deadline:
            _read_until(master, b"\x00never", seen, 0.2)
        assert proc.returncode == 0, bytes(seen[-2000:])
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        os.close(master)
