"""``python -m listenpost.collector ...`` is ``listenpost collector ...``."""

import sys

from listenpost.cli import main

sys.exit(main(["collector", *sys.argv[1:]]))
