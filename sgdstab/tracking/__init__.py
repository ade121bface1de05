"""The tracker in the user's loop: StabilityTracker and its data-parallel and spread variants,
epoch-end measurement, the probe set, constant estimation, checkpoints. May import torch,
sgdstab.theory, sgdstab.shadows and sgdstab.outputs; never the command line."""
