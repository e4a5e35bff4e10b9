"""``python -m bonft.cli ...`` (used under torchrun) runs the ``bonft`` command."""
import sys

from bonft.cli.main import main

sys.exit(main())
