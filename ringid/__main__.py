"""``python -m ringid``: the same command as ``ringid``."""

import sys

from ringid.cli import main

sys.exit(main())
