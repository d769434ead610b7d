"""``python -m midstream``: the ``midstream`` command line, for environments without its script."""

from midstream.client.cli._main import main

raise SystemExit(main())
