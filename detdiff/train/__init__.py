"""Training stage: the epoch loop and its hooks, the loss log, checkpoints, torchrun and the COCOeval pass."""
