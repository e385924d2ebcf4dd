"""Closed-loop simulation: the error file, the truth model and the
re-planning loop. A consumer like verify: imports the model, the reference
and bind, never the command line."""
