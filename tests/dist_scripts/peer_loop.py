"""One rank of a run that all-reduces a number every 50 ms; the test kills or stops a peer mid-run.

python peer_loop.py TIMEOUT_S FLAG_DIR   (RANK, WORLD_SIZE, MASTER_ADDR, MASTER_PORT in the environment)
Writes FLAG_DIR/ready-RANK after the first collective succeeded.
"""
import sys
import time
from pathlib import Path

from bonft.trainer.distributed import init_from_env, reduce_metrics, shutdown

timeout_s, flags = float(sys.argv[1]), Path(sys.argv[2])
ctx = init_from_env(device="cpu", timeout_s=timeout_s)
for i in range(2000):  # ~100 s at most; the test ends it long before
    reduce_metrics({"x": float(ctx.rank)}, ctx)
    if i == 0:
        (flags / f"ready-{ctx.rank}").write_text(str(ctx))
    time.sleep(0.05)
shutdown(ctx)
