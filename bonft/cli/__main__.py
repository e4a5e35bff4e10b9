"""``python -m bonft.cli ...`` (used under torchrun) runs the ``bonft`` command."""
import sys

from .main import main

sys.exit(main())
