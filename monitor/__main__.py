"""``python -m monitor`` is the same as the ``expwatch`` command."""

import sys

from monitor.cli import main

sys.exit(main())
