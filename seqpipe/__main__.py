"""``python -m seqpipe``: the same command as ``seqpipe`` (seqpipe/cli.py)."""

import sys

from seqpipe.cli import main

sys.exit(main())
