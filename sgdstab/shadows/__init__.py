"""The shadow engines: neighbour specs, row substitution, RNG replay, the index-recording loader,
and the per-shadow, batched (vmap) and stacked ways of stepping the shadows. May import torch and
sgdstab.theory; never the tracker, the outputs or the command line."""
