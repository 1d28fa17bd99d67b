import sys

from counterbid.cli import main

sys.exit(main())
