"""The model: vehicle file, the parametric descent SOCP, its cone program,
the time-of-flight search and the Trajectory every solver returns.

Imports only codegen.errors and codegen.fsutil: nothing of a backend, a
consumer or the command line."""
