import sys

from clampd.daemon.cli import main

sys.exit(main())
