"""The GRU next-click model: network, ranking losses, session-parallel batches, the training loop."""
