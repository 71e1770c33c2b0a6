import sys

from diagnostics.cli import main

sys.exit(main())
