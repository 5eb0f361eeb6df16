"""``ionotrail keys``: make a site secret, provision a terminal's key file, inspect a key file.

A secret touches the disk in key files, and in a terminal's store once it
runs (docs/keys.md; the store is created 0600 and ``serve --keys`` refuses
one others may read).  For key files this module keeps three rules: a key
file is created with mode 0600 and never silently replaced (O_CREAT |
O_EXCL; ``--force`` replaces it through a new file renamed over the old, so
a crash leaves one or the other whole); a key file that group or others may
read or write is refused before a byte of it is read (the key may already be
exposed: the fix is chmod 600, and a new key if others could have read it);
and no key is ever printed: only its fingerprint.  :func:`load_key_file`
applies the same checks for the rest of the harness (a master loading its
site secret, a terminal its root).
"""

from __future__ import annotations

import argparse
import errno
import os
import secrets
import stat
import sys
from pathlib import Path
from typing import Any

from ionotrail.harness.cli.common import SAFETY, UserError
from ionotrail.terminal.auth import KeyFileError, SiteSecret, TerminalRoot, decode_key_file, encode_key_file
from ionotrail.terminal.auth.keyfile import KEY_FILE_BYTES
from ionotrail.terminal.auth.keys import MAX_EPOCH
from ionotrail.terminal.limits import AUTH_KEY_BYTES

KEY_FILE_MODE = 0o600
"""Owner may read and write; nobody else anything."""

EXPOSING_BITS = stat.S_IRWXG | stat.S_IRWXO
"""Permission bits that let group or others at a key file; any of them refuses it."""


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "keys",
        help="make the site secret, provision terminal key files, inspect a key file",
        description=(
            "Key files for authenticated commands (docs/keys.md).  The site secret stays at\n"
            "the master; each terminal is provisioned with its own root key, derived from\n"
            "the site secret and its address.  Files are created with mode 0600; a key file\n"
            "readable or writable by group or others is refused.  No key is ever printed:\n"
            "only a fingerprint (8 hex digits) that names it."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    sub = p.add_subparsers(dest="keys_command", metavar="SUBCOMMAND", required=True)

    new = sub.add_parser(
        "new-site", help="generate a new site secret into FILE", epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )  # fmt: skip
    new.add_argument("file", metavar="FILE", help="key file to create (mode 0600)")
    new.add_argument("--force", action="store_true", help="replace FILE if it exists")
    new.set_defaults(handler=run_new_site)

    prov = sub.add_parser(
        "provision", help="derive a terminal's root key file from the site secret", epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )  # fmt: skip
    prov.add_argument("--site", metavar="FILE", required=True, help="the site-secret key file")
    prov.add_argument(
        "--terminal", metavar="ADDRESS", required=True, type=_address, help="terminal address, e.g. 0x0A31"
    )
    prov.add_argument("--epoch", metavar="N", type=_epoch, default=0, help="key epoch (default 0: a new terminal)")
    prov.add_argument("out", metavar="OUT", help="terminal key file to create (mode 0600)")
    prov.add_argument("--force", action="store_true", help="replace OUT if it exists")
    prov.set_defaults(handler=run_provision)

    ins = sub.add_parser(
        "inspect", help="print a key file's role, terminal, epoch and fingerprint (never the key)", epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )  # fmt: skip
    ins.add_argument("file", metavar="FILE", help="key file to inspect")
    ins.set_defaults(handler=run_inspect)


def _address(text: str) -> int:
    try:
        value = int(text, 0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a terminal address (e.g. 0x0A31 or 2609)") from None
    if not 0 <= value <= 0xFFFF:
        raise argparse.ArgumentTypeError(f"terminal address {text} is outside 0 to 0xFFFF")
    return value


def _epoch(text: str) -> int:
    try:
        value = int(text, 0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an epoch number") from None
    if not 0 <= value <= MAX_EPOCH:
        raise argparse.ArgumentTypeError(f"epoch {text} is outside 0 to {MAX_EPOCH}")
    return value


def load_key_file(path: str | os.PathLike[str]) -> SiteSecret | TerminalRoot:
    """The key in the file at ``path``, after checking who may read it; :class:`UserError` naming the file if not.

    The file is opened first and its permissions read from the open
    descriptor, so the file checked is the file read.
    """
    name = os.fspath(path)
    try:
        # O_NONBLOCK: a FIFO given as the key file must not hang the open (it is refused below).
        fd = os.open(name, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_NOFOLLOW", 0))
    except FileNotFoundError:
        raise UserError(f"key file {name} not found") from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise UserError(f"key file {name} is a symbolic link: give the path of the file itself") from None
        raise UserError(f"cannot open key file {name}: {exc.strerror}") from None
    with os.fdopen(fd, "rb") as handle:
        info = os.fstat(handle.fileno())
        if not stat.S_ISREG(info.st_mode):
            raise UserError(f"key file {name} is not a regular file")
        if info.st_mode & EXPOSING_BITS:
            raise UserError(
                f"key file {name} is open to group or others (mode {stat.S_IMODE(info.st_mode):04o}): "
                f"run chmod 600 {name}, and make a new key if others could have read it"
            )
        data = handle.read(KEY_FILE_BYTES + 1)  # one more than a key file: a longer one is refused, not cut
    try:
        return decode_key_file(data)
    except KeyFileError as exc:
        raise UserError(f"key file {name}: {exc.message}") from None


def write_key_file(path: str | os.PathLike[str], key: SiteSecret | TerminalRoot, force: bool = False) -> None:
    """Write ``key`` to a new file at ``path`` with mode 0600; :class:`UserError` if it exists (unless ``force``)."""
    name = os.fspath(path)
    data = encode_key_file(key)
    target = Path(name)
    if target.exists() or target.is_symlink():
        if not force:
            raise UserError(f"{name} exists: refusing to overwrite a key file (give --force to replace it)")
        temporary = target.with_name(f".{target.name}.{secrets.token_hex(4)}.new")
        _create(str(temporary), data)
        try:
            os.replace(temporary, target)
        except OSError as exc:
            temporary.unlink(missing_ok=True)
            raise UserError(f"cannot replace {name}: {exc.strerror}") from None
    else:
        _create(name, data)
    _sync_folder(target.parent)


def _create(name: str, data: bytes) -> None:
    """A new file holding ``data``, mode 0600 whatever the umask, flushed to the medium."""
    try:
        fd = os.open(name, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0), KEY_FILE_MODE)
    except FileExistsError:
        raise UserError(f"{name} exists: refusing to overwrite a key file (give --force to replace it)") from None
    except OSError as exc:
        raise UserError(f"cannot create {name}: {exc.strerror}") from None
    try:
        os.fchmod(fd, KEY_FILE_MODE)  # the umask may have taken bits away, never added: set exactly
        os.write(fd, data)
        os.fsync(fd)
    except OSError as exc:
        os.close(fd)
        os.unlink(name)
        raise UserError(f"cannot write {name}: {exc.strerror}") from None
    os.close(fd)


def _sync_folder(folder: Path) -> None:
    """Make the new directory entry durable too (a POSIX rename or create is durable only then)."""
    try:
        fd = os.open(folder or Path("."), os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems refuse fsync on a directory; the file itself is synced
    finally:
        os.close(fd)


def describe(key: SiteSecret | TerminalRoot) -> str:
    """One line naming a key: role, terminal and epoch, fingerprint; never the key."""
    if isinstance(key, TerminalRoot):
        return f"terminal root  terminal 0x{key.terminal:04x} ({key.terminal})  epoch {key.epoch}  fingerprint {key.fingerprint}"
    return f"site secret  fingerprint {key.fingerprint}"


def run_new_site(args: argparse.Namespace) -> int:
    site = SiteSecret(secrets.token_bytes(AUTH_KEY_BYTES))
    write_key_file(args.file, site, force=args.force)
    print(f"wrote {args.file}: {describe(site)}")
    print("keep this file at the master only; provision each terminal with `ionotrail keys provision`", file=sys.stderr)
    return 0


def run_provision(args: argparse.Namespace) -> int:
    site = load_key_file(args.site)
    if not isinstance(site, SiteSecret):
        raise UserError(
            f"{args.site} holds a terminal root key, not a site secret: give the site-secret file to --site"
        )
    root = site.root(args.terminal, args.epoch)
    write_key_file(args.out, root, force=args.force)
    print(f"wrote {args.out}: {describe(root)}")
    return 0


def run_inspect(args: argparse.Namespace) -> int:
    print(f"{args.file}: {describe(load_key_file(args.file))}")
    return 0
