"""One rank of a trainer run: python train_ranks.py CONFIG.json  (launcher environment as for torchrun)."""
import json
import sys

from bonft.trainer.config import from_dict
from bonft.trainer.loop import train

train(from_dict(json.loads(open(sys.argv[1]).read())), progress=False)
