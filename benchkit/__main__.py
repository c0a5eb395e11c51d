import sys

from benchkit.cli import main

sys.exit(main())
