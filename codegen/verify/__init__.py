"""Verification: `pdgc check`, envelope campaigns, test vectors and the
hand-off package. Consumers of the Solver interface: they import the model,
the reference, emit and bind, never the command line."""
