"""``python -m retrograde.sources.demo --out PATH [--size-bytes N] [--seed S]``."""

import sys

from . import main

sys.exit(main())
