"""``python -m ionotrail``: the same as the ``ionotrail`` command."""

from ionotrail.harness.cli.main import main

raise SystemExit(main())
