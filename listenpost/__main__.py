import sys

from listenpost.cli import main

sys.exit(main())
