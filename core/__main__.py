"""``python -m midstream``: the ``midstream`` command line, for environments without its script."""

from midstream.client.cli import main

raise SystemExit(main())
