"""ionotrail: a meteor-burst remote-terminal protocol stack and its test harness.

``ionotrail.terminal`` is the reference stack (sans-I/O core, asyncio service);
``ionotrail.harness`` is the channel simulator, emulators, runners, test
machinery, benchmarks and the ``ionotrail`` command.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("ionotrail")
except PackageNotFoundError:  # imported from a source tree that was never installed
    __version__ = "0+unknown"
