"""Internals of ``splice tune``: the loop, checkpoints, distributed set-up, warp pre-training."""
