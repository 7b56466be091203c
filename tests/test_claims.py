"""Device claims (drivers/claims.py): one key for every spelling of a device, a folder shared by every
user and a service with a private /tmp, and no claim file that a link or another user could turn against
the claimant.  The other-process behaviour is in test_visa_meter, test_transports and test_modbus_gauge."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from pycnoctl.controller.domain.devices import DeviceDisconnected
from pycnoctl.drivers import claims
from pycnoctl.drivers.claims import ResourceClaim, claim_key, modbus_tcp_key


@pytest.mark.parametrize(("a", "b"), [
    ("TCPIP::127.0.0.1::INSTR", "TCPIP0::127.0.0.1::inst0::INSTR"),  # pyvisa's canonical form
    ("TCPIP::localhost::INSTR", "tcpip::127.0.0.1::instr"),
    ("ASRL/dev/ttyUSB0::INSTR", "asrl/dev/ttyUSB0::INSTR"),
    # found by a later sweep: a USB id in hex or decimal, and a trailing dot, got a second claim
    ("USB0::0x1AB1::0x04CE::DS1ZA1::INSTR", "USB0::6833::1230::DS1ZA1::INSTR"),
    ("TCPIP0::localhost.::inst0::INSTR", "TCPIP::127.0.0.1::INSTR"),
])
def test_one_visa_device_under_any_spelling_is_one_key(a, b):
    # found by a sweep: pyvisa's own canonical spelling of a held meter's name got a second claim
    assert claim_key("visa", a) == claim_key("visa", b)
    assert claim_key("visa", a) != claim_key("visa", "TCPIP::127.0.0.2::INSTR")


def test_one_network_bridge_under_any_spelling_is_one_key():
    same = {claim_key("serial", u) for u in ("socket://127.0.0.1:5020", "SOCKET://localhost:5020?logging=debug",
                                              "socket://127.0.0.1:5020/")}
    assert len(same) == 1
    assert claim_key("serial", "socket://127.0.0.1:5021") not in same
    # every loopback spelling is one host: '127.1' (the short dotted form), '[::1]'
    assert claim_key("serial", "socket://127.1:5020") in same and claim_key("serial", "socket://[::1]:5020") in same
    assert modbus_tcp_key("localhost", 502, 1) == modbus_tcp_key("127.0.0.1", 502, 1) != modbus_tcp_key(
        "127.0.0.1", 502, 2)
    assert claims.networked("RFC2217://host:1") and claims.networked("socket://h:1")
    assert not claims.networked("LOOP://") and not claims.networked("/dev/ttyUSB0")


def test_a_link_in_place_of_a_claim_file_is_never_followed(tmp_path, monkeypatch):
    # found by a sweep: another user's link named like a claim file made the claim truncate its target
    folder = tmp_path / "claims"
    folder.mkdir(mode=0o700)
    monkeypatch.setenv(claims.ENV, str(folder))
    precious = tmp_path / "precious.txt"
    precious.write_text("irreplaceable notes\n")
    key = claim_key("visa", "TCPIP::127.0.0.1::INSTR")
    (folder / claims._file_name(key)).symlink_to(precious)
    with pytest.raises(DeviceDisconnected, match="a link there is never followed"):
        ResourceClaim("visa", "TCPIP::127.0.0.1::INSTR", "pressure").take()
    assert precious.read_text() == "irreplaceable notes\n"


def test_a_claim_file_is_never_written(tmp_path, monkeypatch):
    monkeypatch.setenv(claims.ENV, str(tmp_path))
    c = ResourceClaim("visa", "TCPIP::127.0.0.9::INSTR", "pressure")
    c.take()
    (made,) = tmp_path.iterdir()
    assert made.stat().st_size == 0 and made.stat().st_mode & 0o777 == 0o644  # others may open it to flock
    c.release()


@pytest.mark.parametrize("setup", ["file", "relative", "open_to_all"])
def test_a_claims_folder_that_cannot_be_used_safely_is_one_clear_refusal(tmp_path, monkeypatch, setup):
    # found by a sweep: a claims folder that was a file ended serve and run in 'failed: FileExistsError'
    # (exit 3), and a relative one made a claim depend on the working folder
    if setup == "file":
        where = tmp_path / "afile"
        where.write_text("")
        want = "is not a folder"
    elif setup == "relative":
        where = Path("rel-claims")
        want = "is not an absolute folder"
    else:
        where = tmp_path / "open"
        where.mkdir()
        where.chmod(0o777)  # anyone may replace a claim file there
        want = "writable by everyone without the sticky bit"
    monkeypatch.setenv(claims.ENV, str(where))
    with pytest.raises(DeviceDisconnected, match=want) as exc:
        ResourceClaim("visa", "TCPIP::127.0.0.1::INSTR", "pressure").take()
    assert claims.ENV in str(exc.value)


def test_without_a_setting_the_systems_lock_folder_is_shared_by_every_user(tmp_path, monkeypatch):
    # found by a sweep: the shipped service (private /tmp, no runtime folder) and an operator's terminal
    # kept their claims in two places, and the terminal's probe read the daemon's meter
    locks = tmp_path / "lock"
    locks.mkdir()
    locks.chmod(0o1777)  # as /run/lock is
    monkeypatch.delenv(claims.ENV, raising=False)
    monkeypatch.setattr(claims, "SYSTEM_LOCKS", locks)
    assert claims.claims_dir() == locks


def test_a_personal_folder_another_user_made_is_refused(tmp_path, monkeypatch):
    # where no shared lock folder is writable, a folder of one's own: one made by someone else is not
    monkeypatch.delenv(claims.ENV, raising=False)
    monkeypatch.setattr(claims, "SYSTEM_LOCKS", tmp_path / "no-such-folder")
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path))
    (tmp_path / "pycnoctl-claims").mkdir(mode=0o700)
    assert claims.claims_dir() == tmp_path / "pycnoctl-claims"
    monkeypatch.setattr(os, "getuid", lambda: os.stat(tmp_path).st_uid + 1)
    with pytest.raises(OSError, match="belongs to another user"):
        claims.claims_dir()


def test_claims_in_one_process_are_counted():
    first = ResourceClaim("visa", "TCPIP::127.0.0.7::INSTR", "pressure")
    second = ResourceClaim("visa", "tcpip0::127.0.0.7::inst0::instr", "supply")
    first.take()
    second.take()
    first.release()
    assert claims._held[first.key][1] == 1  # the supply's claim keeps the descriptor
    second.release()
    assert first.key not in claims._held


def test_the_shipped_service_may_write_the_shared_lock_folder():
    # under ProtectSystem=strict every path is read-only but those listed; without /run/lock the service's
    # claims would fall back to its private /tmp, where an operator's terminal never looks
    import configparser

    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str  # type: ignore[assignment,method-assign]
    unit.read(Path(__file__).parents[1] / "systemd" / "pycnoctl.service")
    service = unit["Service"]
    assert service["ProtectSystem"] == "strict" and service["PrivateTmp"] == "yes"
    assert str(claims.SYSTEM_LOCKS) in service["ReadWritePaths"].split()


def test_a_claims_folder_named_but_not_there_yet_is_made(tmp_path, monkeypatch):
    where = tmp_path / "lab" / "claims"
    monkeypatch.setenv(claims.ENV, str(where))
    c = ResourceClaim("visa", "TCPIP::127.0.0.8::INSTR", "pressure")
    c.take()
    assert where.is_dir() and len(list(where.iterdir())) == 1
    c.release()
