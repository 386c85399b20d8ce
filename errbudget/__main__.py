"""``python -m errbudget`` is the same as the ``errbudget`` command."""

import sys

from errbudget.cli import main

sys.exit(main())
