"""``python -m isoscope``."""

import sys

from isoscope.cli import main

sys.exit(main())
