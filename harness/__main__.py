import sys

from harness.console import main

sys.exit(main())
