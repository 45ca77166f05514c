"""``python -m probeplan``."""

import sys

from probeplan.cli.main import main

sys.exit(main())
