"""A verifier for the trainer tests: the share of digits in a response (a varied reward even for a random model)."""
import numpy as np


def digit_share(prompts, responses):
    return np.array([sum(c.isdigit() for c in r) / max(1, len(r)) for r in responses], dtype=float)
