"""PyTorch checkpoints: ``loader`` (tells the archive kinds apart and assembles the checkpoint)
over ``storages``, ``legacy``, ``state_dict``, ``optimizer`` and ``torchscript``; ``unpickler``
(the restricted unpickler: nothing in a file is ever executed) over ``allowlist``,
``stand_ins`` and ``meter``."""
