"""PyTorch checkpoints: ``loader`` (zip, legacy and tar archives, storages, the weights found in
the unpickled tree, optimizer state, TorchScript declarations) and ``unpickler`` (the restricted
unpickler: nothing in a file is ever executed)."""
