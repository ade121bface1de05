"""The mathematics: published SGD stability bounds, divergence recursions, the planner, the rules
that decide which bound a recorded run may use, and the records they read (the step history, the
constants). numpy/scipy and the standard library only: this subpackage never imports torch nor
any other part of sgdstab."""
