"""``python -m detdiff`` (also what ``torchrun -m detdiff audit ...`` starts on every process)."""

import sys

from detdiff.cli import main

sys.exit(main())
