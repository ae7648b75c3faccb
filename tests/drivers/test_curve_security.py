"""CURVE on the network link (loopback only): a listed client key works, an unlisted key and a plain client
get nothing, non-loopback binds without keys are refused, and secret keys never show in logs or errors."""

from __future__ import annotations

import logging
import os
import stat
import sys
import time
from pathlib import Path

import pytest
import zmq

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import FakeController, ThreadServer  # noqa: E402

from drivers.errors import BadURL, LinkLost, LinkTimeout  # noqa: E402
from drivers.keys import KeyFileError, check_allow_dir, generate_keys, load_public_key, load_secret_key  # noqa: E402
from drivers.network_link import NetworkController  # noqa: E402
from drivers.server import InsecureBind, serve  # noqa: E402

pytestmark = pytest.mark.timeout(60)


@pytest.fixture()
def keyring(tmp_path):
    keys = tmp_path / "keys"
    allow = tmp_path / "allow"
    for name in ("server", "alice", "mallory"):
        generate_keys(keys, name)
    allow.mkdir()
    (allow / "alice.key").write_bytes((keys / "alice.key").read_bytes())
    return keys, allow


@pytest.fixture()
def curve_server(keyring, caplog):
    caplog.set_level(logging.DEBUG)
    keys, allow = keyring
    fake = FakeController()
    with ThreadServer(fake, transport="zmq", server_key=str(keys / "server.key_secret"), allow_dir=str(allow),
                      watchdog_s=None) as srv:
        assert srv.announcement["endpoint"].startswith("tcp://127.0.0.1:")
        yield fake, srv.announcement["endpoint"], keys


def _secrets(keys: Path) -> list[bytes]:
    out = []
    for f in keys.glob("*.key_secret"):
        out.append(load_secret_key(f)[1])
    return out


def test_listed_key_works(curve_server):
    fake, endpoint, keys = curve_server
    url = endpoint.replace("tcp://", "zmq+tcp://") + f"?server={keys / 'server.key'}&client={keys / 'alice.key_secret'}"
    with NetworkController.from_url(url) as c:
        c.move_z(1e-6)
        assert c.status().z_m == 1e-6 and fake.stage.z_m == 1e-6


@pytest.mark.parametrize("client", ["mallory", "plain", "wrong-server-key"])
def test_strangers_get_nothing(curve_server, client, caplog):
    fake, endpoint, keys = curve_server
    before = sum(fake.calls.values())
    t0 = time.monotonic()
    with pytest.raises((LinkLost, LinkTimeout)) as err:
        if client == "mallory":
            NetworkController(endpoint, server_key=str(keys / "server.key"),
                              client_key=str(keys / "mallory.key_secret"), timeout_s=0.5, retries=0)
        elif client == "plain":
            NetworkController(endpoint, timeout_s=0.5, retries=0)
        else:
            NetworkController(endpoint, server_key=str(keys / "mallory.key"),
                              client_key=str(keys / "alice.key_secret"), timeout_s=0.5, retries=0)
    assert time.monotonic() - t0 < 2.0
    assert sum(fake.calls.values()) == before  # nothing reached the controller
    for secret in _secrets(keys):
        assert secret.decode() not in str(err.value)
        assert secret.decode() not in caplog.text


def test_raw_plain_socket_gets_no_reply(curve_server):
    fake, endpoint, keys = curve_server
    ctx = zmq.Context()
    try:
        s = ctx.socket(zmq.REQ)
        s.setsockopt(zmq.LINGER, 0)
        s.connect(endpoint)
        s.send(b'{"v":1,"session":"x","id":1,"cmd":"MOTion:Z","args":[5e-6]}')
        assert not s.poll(500)
        s.close(0)
    finally:
        ctx.term()
    assert fake.stage.z_m == 0.0


def test_secrets_stay_out_of_the_logs(curve_server, caplog):
    fake, endpoint, keys = curve_server
    with NetworkController(endpoint, server_key=str(keys / "server.key"), client_key=str(keys / "alice.key_secret")) as c:
        c.status()
    text = "\n".join(r.getMessage() for phase in ("setup", "call") for r in caplog.get_records(phase))
    assert "serving on tcp://127.0.0.1" in text and "ALLOWED" in text  # the server and the authenticator did log
    for secret in _secrets(keys):
        assert secret.decode() not in text  # but no secret key


def test_non_loopback_bind_without_keys_refused_with_instructions():
    with pytest.raises(InsecureBind, match="mfma keys generate"):
        serve(FakeController(), transport="zmq", bind="tcp://0.0.0.0:0", announce=lambda d: None)


def test_half_configured_curve_refused(keyring):
    keys, allow = keyring
    with pytest.raises(InsecureBind, match="both"):
        serve(FakeController(), transport="zmq", server_key=str(keys / "server.key_secret"), announce=lambda d: None)


def test_key_files(tmp_path, keyring):
    keys, allow = keyring
    pub, sec = keys / "server.key", keys / "server.key_secret"
    assert stat.S_IMODE(os.stat(sec).st_mode) == 0o600
    assert load_public_key(pub) == load_secret_key(sec)[0]
    assert check_allow_dir(allow) == 1
    with pytest.raises(KeyFileError, match="already exists"):
        generate_keys(keys, "server")
    with pytest.raises(KeyFileError, match="does not exist"):
        load_public_key(tmp_path / "nope.key")
    with pytest.raises(KeyFileError, match="no secret key"):
        load_secret_key(pub)
    junk = tmp_path / "junk.key_secret"
    junk.write_bytes(b"\xff\x00 not a certificate")
    with pytest.raises(KeyFileError) as err:
        load_secret_key(junk)
    assert "not a certificate" not in str(err.value)  # the file is named, its content is not echoed
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(KeyFileError, match="no client public keys"):
        check_allow_dir(empty)
    with pytest.raises(KeyFileError, match="name"):
        generate_keys(tmp_path, "../escape")
    with pytest.raises(BadURL, match="both"):
        NetworkController("tcp://127.0.0.1:1", server_key=str(pub))
