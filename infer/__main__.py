import sys

from infer.cli import main

sys.exit(main())
