import sys

from cmbtools.cli import main

sys.exit(main())
