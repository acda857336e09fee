"""``python -m rig.cli``: the ``rig`` command."""

import sys

from rig.cli.app import main

sys.exit(main())
