"""``python -m stackdr.cli``: the command line."""

import sys

from stackdr.cli import main

sys.exit(main())
