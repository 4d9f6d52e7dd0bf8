"""``python -m dueroute``: the same as the ``dueroute`` command."""

import sys

from dueroute.service.cli.main import main

sys.exit(main())
