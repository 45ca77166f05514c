"""``python -m probeplan``."""

import sys

from probeplan.cli import main

sys.exit(main())
