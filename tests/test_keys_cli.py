"""``ionotrail keys`` with real files: modes, refusals, and no key in any output."""

from __future__ import annotations

import base64
import os
import signal
import stat
import subprocess
import sys
from pathlib import Path

import pytest
from ionotrail.harness.cli.common import SAFETY, UserError
from ionotrail.harness.cli.keys import load_key_file
from ionotrail.harness.cli.main import main
from ionotrail.terminal.auth import SiteSecret, TerminalRoot, decode_key_file, encode_key_file


def keys(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(["keys", *map(str, args)])
    out, err = capsys.readouterr()
    return code, out, err


def _mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def _no_key_in(text: str, *secrets_: bytes) -> None:
    for secret in secrets_:
        for form in (secret.hex(), secret.hex().upper(), base64.b64encode(secret).decode(), repr(secret)):
            assert form not in text
        assert secret.hex()[:16] not in text  # not even a piece of it


@pytest.fixture
def site(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> Path:
    path = tmp_path / "site.key"
    code, _out, err = keys(capsys, "new-site", path)
    assert code == 0, err
    return path


def test_new_site_writes_a_0600_site_secret(site: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert _mode(site) == 0o600
    key = decode_key_file(site.read_bytes())
    assert isinstance(key, SiteSecret)
    code, out, err = keys(capsys, "inspect", site)
    assert code == 0 and f"site secret  fingerprint {key.fingerprint}" in out
    _no_key_in(out + err, key.material)


def test_new_site_keys_differ(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for name in ("a.key", "b.key"):
        assert keys(capsys, "new-site", tmp_path / name)[0] == 0
    assert (tmp_path / "a.key").read_bytes() != (tmp_path / "b.key").read_bytes()  # drawn by the secrets module


def test_provision_derives_the_terminal_root(site: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out_path = tmp_path / "t0a31.key"
    code, out, err = keys(capsys, "provision", "--site", site, "--terminal", "0x0A31", out_path)
    assert code == 0, err
    assert _mode(out_path) == 0o600
    secret = decode_key_file(site.read_bytes())
    assert isinstance(secret, SiteSecret)
    root = decode_key_file(out_path.read_bytes())
    assert root == secret.root(0x0A31, 0)
    assert isinstance(root, TerminalRoot)
    assert f"terminal 0x0a31 (2609)  epoch 0  fingerprint {root.fingerprint}" in out
    code, inspected, err2 = keys(capsys, "inspect", out_path)
    assert code == 0 and f"terminal 0x0a31 (2609)  epoch 0  fingerprint {root.fingerprint}" in inspected
    _no_key_in(out + err + inspected + err2, secret.material, root.material)
    epoch3 = tmp_path / "t3.key"
    assert keys(capsys, "provision", "--site", site, "--terminal", "2609", "--epoch", "3", epoch3)[0] == 0
    assert decode_key_file(epoch3.read_bytes()) == secret.root(0x0A31, 3)


def test_provision_refuses_a_terminal_file_as_the_site(
    site: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    terminal = tmp_path / "t.key"
    keys(capsys, "provision", "--site", site, "--terminal", "1", terminal)
    code, _out, err = keys(capsys, "provision", "--site", terminal, "--terminal", "2", tmp_path / "u.key")
    assert code == 2 and "not a site secret" in err and err.count("\n") == 1
    assert not (tmp_path / "u.key").exists()


def test_no_overwrite_without_force(site: Path, capsys: pytest.CaptureFixture[str]) -> None:
    before = site.read_bytes()
    code, _out, err = keys(capsys, "new-site", site)
    assert code == 2
    assert (
        err == f"ionotrail keys: error: {site} exists: refusing to overwrite a key file (give --force to replace it)\n"
    )
    assert site.read_bytes() == before
    assert keys(capsys, "new-site", site, "--force")[0] == 0
    assert site.read_bytes() != before and _mode(site) == 0o600
    assert sorted(p.name for p in site.parent.iterdir()) == ["site.key"]  # no temporary left behind


def test_files_are_0600_whatever_the_umask(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    old = os.umask(0)
    try:
        assert keys(capsys, "new-site", tmp_path / "open.key")[0] == 0
    finally:
        os.umask(old)
    assert _mode(tmp_path / "open.key") == 0o600


@pytest.mark.parametrize("mode", [0o640, 0o604, 0o620, 0o602, 0o660, 0o644, 0o610])
def test_a_key_file_open_to_others_is_refused(site: Path, capsys: pytest.CaptureFixture[str], mode: int) -> None:
    site.chmod(mode)
    code, out, err = keys(capsys, "inspect", site)
    assert code == 2 and out == ""
    assert err == (
        f"ionotrail keys: error: key file {site} is open to group or others (mode {mode:04o}): "
        f"run chmod 600 {site}, and make a new key if others could have read it\n"
    )
    with pytest.raises(UserError, match="chmod 600"):
        load_key_file(site)
    site.chmod(0o600)
    assert isinstance(load_key_file(site), SiteSecret)


def test_a_damaged_or_foreign_file_is_one_line(tmp_path: Path, site: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = site.read_bytes()
    cases = {
        "flipped.key": (data[:20] + bytes([data[20] ^ 1]) + data[21:], "damaged: its CRC-32C does not match"),
        "short.key": (data[:30], "truncated: 30 bytes of 50"),
        "long.key": (data + b"\n", "too long"),
        "text.key": (b"not a key\n", "not an ionotrail key file"),
        "empty.key": (b"", "empty"),
    }
    for name, (content, message) in cases.items():
        path = tmp_path / name
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        os.write(fd, content)
        os.close(fd)
        code, out, err = keys(capsys, "inspect", path)
        assert out == ""
        assert code == 2 and err.count("\n") == 1 and message in err and str(path) in err, (name, err)
        assert "Traceback" not in err
        assert "0x" not in err  # no CRC value: one over the key bytes tells 32 bits about the key
    code, _out, err = keys(capsys, "inspect", tmp_path / "missing.key")
    assert code == 2 and err == f"ionotrail keys: error: key file {tmp_path / 'missing.key'} not found\n"


def test_a_fifo_is_refused_without_waiting_for_a_writer(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    fifo = tmp_path / "fifo.key"
    os.mkfifo(fifo, 0o600)

    def waited(_signum: int, _frame: object) -> None:
        raise AssertionError("the open waited for a writer")

    previous = signal.signal(signal.SIGALRM, waited)
    signal.alarm(5)
    try:
        code, out, err = keys(capsys, "inspect", fifo)
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)
    assert (code, out) == (2, "") and err == f"ionotrail keys: error: key file {fifo} is not a regular file\n"


def test_a_symlink_is_not_followed(site: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    link = tmp_path / "link.key"
    link.symlink_to(site)
    code, out, err = keys(capsys, "inspect", link)
    assert code == 2 and out == "" and f"key file {link} is a symbolic link" in err
    code, _out, err = keys(capsys, "new-site", link)
    assert code == 2 and "exists" in err


def test_load_key_file_round_trip(tmp_path: Path) -> None:
    root = SiteSecret(bytes(range(32))).root(0x0A31, 1)  # an invented site secret
    path = tmp_path / "t.key"
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    os.write(fd, encode_key_file(root))
    os.close(fd)
    assert load_key_file(path) == root
    assert load_key_file(str(path)) == root


def test_bad_addresses_are_refused(site: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for address in ("0x10000", "-1", "gauge"):
        with pytest.raises(SystemExit) as caught:
            main(["keys", "provision", "--site", str(site), "--terminal", address, str(tmp_path / "x.key")])
        assert caught.value.code == 2
        assert "--terminal" in capsys.readouterr().err
    assert not (tmp_path / "x.key").exists()


def test_help_carries_the_safety_note(tmp_path: Path) -> None:
    for args in (
        ["keys", "--help"],
        ["keys", "new-site", "--help"],
        ["keys", "provision", "--help"],
        ["keys", "inspect", "--help"],
    ):
        result = subprocess.run(
            [sys.executable, "-m", "ionotrail", *args],
            capture_output=True,
            text=True,
            timeout=60,
            check=False,
            cwd=tmp_path,
        )
        assert result.returncode == 0, result.stderr
        assert " ".join(SAFETY.split()) in " ".join(result.stdout.split())
