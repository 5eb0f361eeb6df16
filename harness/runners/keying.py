"""Keys for simulated and emulated runs.

A simulated link still signs its commands (the code path is the one a
deployment runs), with a site secret derived from the run's seed so that a
run replays exactly.  Such a secret is public to anyone who knows the seed:
it is for simulation and tests, never for a station on the air, which takes
its keys from files (``ionotrail keys``, docs/keys.md).
"""

from __future__ import annotations

import hashlib

from ionotrail.terminal.auth.authenticator import TerminalAuthenticator
from ionotrail.terminal.auth.keys import SiteSecret

LABEL = b"ionotrail simulated site secret, not for use on the air\x00"


def simulated_site(seed: int) -> SiteSecret:
    """The site secret of a simulated run with ``seed``."""
    return SiteSecret(hashlib.sha256(LABEL + seed.to_bytes(16, "big", signed=True)).digest())


def simulated_terminal(seed: int, terminal: int) -> TerminalAuthenticator:
    """Terminal ``terminal``'s keys in a simulated run with ``seed``, at epoch 0."""
    return TerminalAuthenticator(simulated_site(seed).root(terminal))
